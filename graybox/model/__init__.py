"""The model layer: equation text in, a checked :class:`~graybox.model.spec.ModelSpec` out.

* :mod:`~graybox.model.expr`: expression trees (safe parsing, simplification, derivatives);
* :mod:`~graybox.model.units`: dimensional analysis of the trees with pint;
* :mod:`~graybox.model.build`: the ``[model]`` and ``[parameters]`` tables checked into a spec;
* :mod:`~graybox.model.spec`: the checked spec every later layer reads;
* :mod:`~graybox.model.codegen`: Python source emitted from the trees (never user text);
* :mod:`~graybox.model.api`: a model whose right-hand side is a Python function.
"""
