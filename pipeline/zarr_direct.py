"""Encoding a dataset's arrays as zarr 3 documents and chunks directly, without zarr's async store calls.

``xarray.Dataset.to_zarr`` creates every array and writes its chunks
through zarr's event loop: two round trips to zarr's I/O thread per array
and the codec pipeline's bookkeeping, about 2.5 ms of CPU an array on the
development machine, and a results store has some 140 arrays (0.35 s of a
run's critical path after its last frame). The variables a run stores are
of a few plain kinds (float64, int64, bool, uint8, variable-length text;
one dimension or a thumbnail stack), so this module writes exactly what
xarray and zarr write for them: the same ``zarr.json`` documents (xarray's
``_FillValue`` attribute for floats, zarr's metadata layout and JSON
indentation) and the same chunk bytes (the ``bytes`` or ``vlen-utf8`` codec,
then zstd level 0 without checksum; edge chunks padded with the fill value
to the full chunk shape; chunks equal to the fill value throughout not
written, zarr's ``write_empty_chunks: false``). A group with anything else
(another dtype, encodings beyond ``chunks``, non-index coordinates, numpy
values in attributes), or zarr configured to write chunks of the fill value
or in Fortran order, is left to xarray: :func:`encode_group` returns None.
``tests/test_zarr_direct.py`` checks stores written both ways file for file.
"""

from __future__ import annotations

import base64
import itertools
import json
import math

import numpy as np

#: zstd as zarr's default compressor for zarr 3 arrays writes it (numcodecs' Zstd, level 0, no checksum).
_ZSTD_CONFIG = {"name": "zstd", "configuration": {"level": 0, "checksum": False}}


def _codecs():
    from numcodecs.vlen import VLenUTF8
    from numcodecs.zstd import Zstd

    return Zstd(level=0, checksum=False), VLenUTF8()


#: numpy dtype -> (zarr data_type, JSON fill value, fill value, bytes codec has an endian, xarray's _FillValue).
_KINDS = {
    np.dtype(np.float64): ("float64", "NaN", np.nan, True, base64.standard_b64encode(
        np.float64(np.nan).tobytes()).decode()),
    np.dtype(np.int64): ("int64", 0, 0, True, None),
    np.dtype(np.bool_): ("bool", False, False, False, None),
    np.dtype(np.uint8): ("uint8", 0, 0, False, None),
}


def _is_text(dtype: np.dtype) -> bool:
    return dtype.kind == "T" and getattr(dtype, "na_object", None) is None


def _plain_json(value) -> bool:
    """True for attribute values zarr writes as they are (Python scalars, finite floats, lists of those)."""
    if isinstance(value, (str, bool, int)) and not isinstance(value, np.generic):
        return True
    if isinstance(value, float) and not isinstance(value, np.generic):
        return math.isfinite(value)
    if isinstance(value, list):
        return all(_plain_json(v) for v in value)
    return False


def _zarr_defaults_in_force() -> bool:
    """True where zarr's settings that shape the files are its defaults (C order, no chunks of the fill value)."""
    import zarr

    return (not zarr.config.get("array.write_empty_chunks", False)
            and zarr.config.get("array.order", "C") == "C")


def _chunk_keys(shape, chunks):
    """(key, slices) of every chunk of a regular grid, C order, keys with the '/' separator."""
    counts = [max(1, -(-s // c)) if s else 0 for s, c in zip(shape, chunks)]
    for index in itertools.product(*(range(n) for n in counts)):
        key = "c/" + "/".join(str(i) for i in index)
        yield key, tuple(slice(i * c, min((i + 1) * c, s)) for i, c, s in zip(index, chunks, shape))


def _array_document(data_type, shape, chunks, fill_json, codecs, attrs, dims, indent) -> bytes:
    doc = {"shape": list(shape), "data_type": data_type,
           "chunk_grid": {"name": "regular", "configuration": {"chunk_shape": list(chunks)}},
           "chunk_key_encoding": {"name": "default", "configuration": {"separator": "/"}},
           "fill_value": fill_json, "codecs": codecs, "attributes": attrs, "dimension_names": list(dims),
           "zarr_format": 3, "node_type": "array", "storage_transformers": []}
    return json.dumps(doc, allow_nan=True, indent=indent).encode()


def group_document(attrs: dict, indent=2) -> bytes:
    """The ``zarr.json`` of a zarr 3 group with these attributes, as zarr writes it."""
    return json.dumps({"attributes": attrs, "zarr_format": 3, "node_type": "group"}, indent=indent,
                      allow_nan=True).encode()


def _variable_plan(var):
    """(kind, chunks) of a variable this module can write, or None."""
    enc = var.encoding
    if set(enc) - {"chunks"} or "chunks" not in enc or var.ndim == 0:
        return None
    chunks = tuple(int(c) for c in enc["chunks"])
    if len(chunks) != var.ndim or any(c < 1 for c in chunks):
        return None
    if "_FillValue" in var.attrs or "coordinates" in var.attrs or not all(
            isinstance(k, str) and _plain_json(v) for k, v in var.attrs.items()):
        return None
    dtype = var.dtype
    if _is_text(dtype):
        return "text", chunks
    if dtype in _KINDS and dtype.byteorder in ("=", "<", "|"):
        return "fixed", chunks
    return None


def encode_group(ds, indent=2) -> dict[str, bytes] | None:
    """Every file of one group of a zarr 3 store, as ``Dataset.to_zarr`` writes it, or None.

    Parameters
    ----------
    ds : xarray.Dataset
        Text variables already variable-length strings
        (:func:`grainhabit.results.as_stored`); every variable with its
        ``encoding["chunks"]`` set (:func:`grainhabit.append.set_chunking`)
        and no other encoding.
    indent : int
        zarr's ``json_indent`` setting.

    Returns
    -------
    dict of str -> bytes or None
        Key relative to the group (``zarr.json``, ``<var>/zarr.json``,
        ``<var>/c/0``, ...) to the file's bytes; None where a variable or
        attribute is of a kind this module does not write (use xarray).
    """
    if not _zarr_defaults_in_force():
        return None
    if any(name not in ds.dims for name in ds.coords) or not all(
            isinstance(k, str) and _plain_json(v) for k, v in ds.attrs.items()):
        return None
    plans = {}
    for name, var in ds.variables.items():
        plan = _variable_plan(var)
        if plan is None or not isinstance(name, str) or "/" in name:
            return None
        plans[name] = plan
    zstd, vlen = _codecs()
    files = {"zarr.json": group_document(dict(ds.attrs), indent)}
    for name, var in ds.variables.items():
        kind, chunks = plans[name]
        attrs = dict(var.attrs)
        values = var.values
        if kind == "text":
            data_type, fill_json, fill = "string", "", ""
            codecs = [{"name": "vlen-utf8", "configuration": {}}, _ZSTD_CONFIG]
        else:
            data_type, fill_json, fill, endian, fill_attr = _KINDS[var.dtype]
            codecs = [{"name": "bytes", "configuration": {"endian": "little"}} if endian else {"name": "bytes"},
                      _ZSTD_CONFIG]
            if fill_attr is not None:
                attrs["_FillValue"] = fill_attr
        files[f"{name}/zarr.json"] = _array_document(data_type, var.shape, chunks, fill_json, codecs, attrs,
                                                     var.dims, indent)
        for key, where in _chunk_keys(var.shape, chunks):
            part = values[where]
            if kind == "text":
                if not np.any(part != ""):
                    continue  # all fill value: zarr writes no chunk
                block = np.full(chunks, "", dtype=object)
                block[tuple(slice(0, s) for s in part.shape)] = part
                raw = vlen.encode(block)
            else:
                if np.array_equal(part, np.broadcast_to(np.asarray(fill, dtype=part.dtype), part.shape),
                                  equal_nan=part.dtype.kind == "f"):
                    continue
                block = np.full(chunks, fill, dtype=var.dtype.newbyteorder("<") if endian else var.dtype)
                block[tuple(slice(0, s) for s in part.shape)] = part
                raw = block.tobytes()
            files[f"{name}/{key}"] = bytes(zstd.encode(raw))
    return files
