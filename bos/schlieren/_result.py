"""Reading and writing result-file geometry the way BOS result files do.

Result files store object-plane coordinates ``y``/``x`` with the picture
rows/columns ``row_px``/``col_px`` as auxiliary coordinates.  Whether the
file's ``y`` (and so ``deflection_y``) points down (with the image rows) or
up is read from the file itself: from how ``y`` changes with ``row_px``, or
from the ``positive`` / ``long_name`` attributes.  The library works in
image orientation (y down) throughout.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InputError


def y_points_up(data) -> bool:
    """True when the result's ``y`` coordinate points up (against the image rows)."""
    coords = data.coords
    if "y" in coords and "row_px" in coords:
        y = np.asarray(coords["y"].data, float)
        r = np.asarray(coords["row_px"].data, float)
        if y.size >= 2 and r.size == y.size and y[-1] != y[0] and r[-1] != r[0]:
            return bool((y[-1] - y[0]) * (r[-1] - r[0]) < 0)
    if "y" in coords:
        attrs = coords["y"].attrs
        if str(attrs.get("positive", "")).lower() == "down":
            return False
        if "(up)" in str(attrs.get("long_name", "")) or str(attrs.get("positive", "")).lower() == "up":
            return True
    return False


def deflection_image_frame(data) -> tuple[np.ndarray, np.ndarray]:
    """``(eps_y, eps_x)`` of a BOS result in image orientation (y down) [rad]."""
    for key in ("deflection_y", "deflection_x"):
        if key not in data.variables:
            raise InputError(f"result has no {key!r}: a BOS deflection field is needed")
    ey = np.asarray(data.variables["deflection_y"].data, float)
    ex = np.asarray(data.variables["deflection_x"].data, float)
    return (-ey if y_points_up(data) else ey), ex


def file_coords(y_down_m, x_m, rows_px, cols_px, *, what: str) -> dict[str, Any]:
    """Coordinates ``y``, ``x``, ``row_px``, ``col_px`` in the orientation BOS result files use.

    Follows :mod:`bos.output` (``file_y`` present: y up), else y down.
    """
    try:
        from ..output import file_y
    except ImportError:  # result files with y down
        file_y = None
    rows, cols = np.asarray(rows_px, float), np.asarray(cols_px, float)
    x_attrs = {"units": "m", "long_name": "object-plane x (right)", "axis": "X",
               "description": f"object-plane coordinate of the {what}; x points right (grows with the column), "
                              "origin at the picture centre"}
    if file_y is not None:
        y = file_y(y_down_m)
        y_attrs = {"units": "m", "long_name": "object-plane y (up)", "axis": "Y",
                   "description": f"object-plane coordinate of the {what}; y points up (the row index row_px "
                                  "grows the other way), origin at the picture centre"}
        px = {"units": "1", "display_units": "px"}
    else:
        y = np.asarray(y_down_m, float)
        y_attrs = {"units": "m", "long_name": "object-plane y (down)", "positive": "down", "axis": "Y",
                   "description": f"object-plane coordinate of the {what}; y points DOWN (grows with the row), "
                                  "origin at the picture centre"}
        px = {"units": "px"}
    return {
        "y": {"dims": ("y",), "data": np.asarray(y, float), "attrs": y_attrs},
        "x": {"dims": ("x",), "data": np.asarray(x_m, float), "attrs": x_attrs},
        "row_px": {"dims": ("y",), "data": rows, "attrs": {**px, "long_name": f"row of the {what} (0 = top row)"}},
        "col_px": {"dims": ("x",), "data": cols,
                   "attrs": {**px, "long_name": f"column of the {what} (0 = left column)"}},
    }
