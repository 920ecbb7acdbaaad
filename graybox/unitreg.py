"""The one pint unit registry of graybox.

The model's unit checks, the config's quantity texts and the data layer's conversions all
use it, so quantities from any of them combine, and a process builds it once (building a
registry costs about a quarter of a second: every command and every batch job pays it).
Offset units (degC, degF) are never converted silently: temperatures read on an offset
scale are told apart from differences where they are declared, not guessed.
"""

from __future__ import annotations

from functools import lru_cache

import pint


@lru_cache(maxsize=1)
def registry() -> pint.UnitRegistry:
    ureg = pint.UnitRegistry(autoconvert_offset_to_baseunit=False)
    ureg.define("USgal = gallon")  # the U.S. gallon by the name historian exports use
    return ureg
