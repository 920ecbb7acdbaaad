"""graybox: gray-box parameter estimation for first-principles process models.

Data flows one way: config -> data + model -> simulation -> estimate -> uncertainty ->
diagnostics -> report.  Each layer lives in its own subpackage.
"""

__version__ = "0.1.0"
