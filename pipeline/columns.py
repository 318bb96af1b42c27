"""Units and long names of the variables in the results store.

The names are fixed by the design contract; steps that add further
columns declare them in ``StepInfo.outputs``.
"""

from __future__ import annotations

from .params import Column

#: Columns of the ``grains`` group that every run carries, in this order.
GRAIN_COLUMNS = (
    Column("frame", "1", "index into the frames group"),
    Column("source", "", "file path of the frame, with #N for page N"),
    Column("sample", "", "sample name"),
    Column("label", "1", "grain label in the frame's label image"),
    Column("centroid_x_nm", "nm", "centroid x (along columns, from the frame's left edge)"),
    Column("centroid_y_nm", "nm", "centroid y (along rows, from the frame's top edge)"),
    Column("area_nm2", "nm^2", "projected area of the visible outline"),
    Column("ecd_nm", "nm", "equivalent circle diameter"),
    Column("perimeter_nm", "nm", "perimeter of the sub-pixel outline"),
    Column("feret_max_nm", "nm", "maximum Feret diameter"),
    Column("feret_min_nm", "nm", "minimum Feret diameter"),
    Column("feret_ratio", "1", "Feret ratio (min / max)"),
    Column("form_factor", "1", "form factor 4 pi A / P^2 (ISO 9276-6)"),
    Column("circularity", "1", "circularity sqrt(4 pi A / P^2) (ISO 9276-6)"),
    Column("solidity", "1", "solidity (area / convex hull area)"),
    Column("n_corners", "1", "number of corners of the fitted outline polygon"),
    Column("edge_ratio", "1", "short / long edge of the fitted outline polygon"),
    Column("habit", "", "crystal habit"),
    Column("habit_score", "1", "confidence of the habit assignment, 0..1"),
    Column("alpha", "1", "growth-rate parameter sqrt(3) v100 / v111"),
    Column("alpha_lo", "1", "lowest alpha the outline cannot tell apart"),
    Column("alpha_hi", "1", "highest alpha the outline cannot tell apart"),
    Column("thickness_nm", "nm", "thickness of a tabular grain"),
    Column("tabular_aspect_ratio", "1", "tabular aspect ratio (ECD / thickness)"),
    Column("edge_cut", "", "grain touches the frame border"),
    Column("split", "", "grain came from splitting touching grains"),
)

#: Default fill for columns a chain did not produce, by column name.
GRAIN_FILL = {
    "habit": "", "habit_score": float("nan"), "edge_cut": False, "split": False, "n_corners": 0,
}

FRAME_COLUMNS = (
    Column("source", "", "file path of the frame, with #N for page N"),
    Column("sample", "", "sample name"),
    Column("status", "", "ok or failed"),
    Column("error", "", "why the frame failed: step name and reason"),
    Column("grain_count", "1", "grains found in the frame"),
    Column("pixel_size_nm", "nm", "pixel size"),
    Column("calibration", "", "where the pixel size came from"),
    Column("content_hash", "", "hash of the frame's stored bytes"),
    Column("stage_key", "", "key of the frame's staged result"),
    Column("rows", "1", "frame height in pixels"),
    Column("cols", "1", "frame width in pixels"),
    Column("polarity", "", "grain contrast: bright or dark"),
    Column("notes", "", "remarks from reading and processing"),
    Column("qc", "", "why an ok frame's result is not to be trusted (codes, comma-separated; empty if none)"),
    Column("seconds", "s", "processing time of the frame"),
)


def describe(columns) -> dict[str, Column]:
    """Map column name to its :class:`Column`."""
    return {c.name: c for c in columns}
