"""Growing a results store in place: a night adds its rows, the archive is not rewritten.

A night that only adds frames appends their rows to the ``grains``,
``frames``, ``outlines`` and ``thumbnails`` groups and replaces the small
groups computed over all grains (``summary`` and the other summarise
outputs). The store is changed so that a reader sees the old or the new
state, never a mix:

1. the new rows are encoded into an in-memory zarr store that holds a copy
   of the store's metadata and the last, partly filled chunk of every
   appended array (zarr stores an edge chunk at full size, so that chunk's
   old rows stay as they were);
2. the chunk files are written first, each under a temporary name and
   renamed: chunks past the old length are invisible to the old metadata,
   and a rewritten edge chunk holds the same old rows;
3. the replaced groups' arrays are single-chunk arrays whose chunk file name
   alternates between two spellings (``c/0`` and ``c.0``, zarr's two
   separators), so the new chunks never overwrite the ones the committed
   metadata points at;
4. the metadata documents follow, and the root ``zarr.json`` with the
   consolidated metadata of the whole store is renamed into place last: that
   rename is the commit. xarray and zarr read the consolidated metadata by
   default, so ``xarray.open_zarr(path, group="grains")`` sees either all
   of the night or none of it. (A reader that ignores the consolidated
   metadata and opens array by array could see the per-array documents
   change one after another during the few milliseconds of step 4.)

A run that dies before the commit leaves the committed state readable; the
chunks it wrote past the committed length are overwritten by the next night.
Nights that change or remove rows (a changed file, ``on_missing: drop``, a
failed frame done again, a new column) rewrite the whole store instead
(:func:`pipeline.results.write_results`).
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from pathlib import Path

import numpy as np
import xarray as xr
import zarr

from .results import METADATA_FILE, as_stored, consolidate

#: Appendable groups and their row dimension.
APPEND_DIMS = {"grains": "grain", "frames": "frame", "outlines": "vertex", "thumbnails": "frame"}

#: Rows per chunk along the row dimension, chosen so a chunk is some 100 KB to 1 MB.
CHUNK_ROWS = {"grain": 16384, "frame": 2048, "vertex": 65536}

#: Thumbnails per chunk (a thumbnail is up to 256 x 256 bytes).
THUMBS_PER_CHUNK = 8


class CannotAppend(Exception):
    """The night's rows do not fit the stored arrays (new column, other dtype, larger thumbnails)."""


def set_chunking(groups: dict[str, xr.Dataset]) -> dict[str, xr.Dataset]:
    """Set the zarr chunks of every variable for a store that will grow.

    Appendable groups get fixed-size chunks along their row dimension (whole
    other dimensions); every other group gets one chunk per array (it is
    rewritten each night, see the module docstring).

    Parameters
    ----------
    groups : dict of str -> xarray.Dataset
        Modified in place (variables' ``encoding``) and returned.
    """
    for name, ds in groups.items():
        dim = APPEND_DIMS.get(name)
        for var in ds.variables.values():
            if var.ndim == 0:
                continue
            if dim and var.dims[0] == dim:
                rows = THUMBS_PER_CHUNK if name == "thumbnails" and var.ndim == 3 else CHUNK_ROWS[dim]
                var.encoding["chunks"] = (rows,) + tuple(max(1, s) for s in var.shape[1:])
            else:
                var.encoding["chunks"] = tuple(max(1, s) for s in var.shape)
    return groups


def _read(path: Path) -> bytes | None:
    try:
        return path.read_bytes()
    except FileNotFoundError:
        return None


def _write_atomic(target: Path, data: bytes, made: set) -> None:
    if target.parent not in made:
        target.parent.mkdir(parents=True, exist_ok=True)
        made.add(target.parent)
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex[:8]}.tmp")
    tmp.write_bytes(data)
    os.replace(tmp, target)


def _buffer(data: bytes):
    from zarr.core.buffer import default_buffer_prototype

    return default_buffer_prototype().buffer.from_bytes(data)


def _metadata_docs(folder: Path) -> dict[str, dict]:
    """Every ``zarr.json`` of a store from its consolidated root document: key -> document."""
    root = json.loads((folder / METADATA_FILE).read_text())
    cons = (root.get("consolidated_metadata") or {}).get("metadata")
    if cons is None:
        raise CannotAppend("the store has no consolidated metadata")
    docs = {METADATA_FILE: {k: v for k, v in root.items() if k != "consolidated_metadata"}}
    for path, doc in cons.items():
        docs[f"{path}/{METADATA_FILE}"] = doc
    return docs


def _separator(doc: dict) -> str:
    cke = doc.get("chunk_key_encoding") or {}
    return (cke.get("configuration") or {}).get("separator", "/")


def _check_fits(name: str, old: xr.Dataset, new: xr.Dataset, dim: str) -> xr.Dataset:
    """Return ``new`` cast to the stored dtypes, or raise CannotAppend."""
    if set(old.variables) != set(new.variables):
        extra = sorted(set(new.variables) ^ set(old.variables))
        raise CannotAppend(f"{name}: the variables differ ({', '.join(extra)})")
    out = new.copy()
    for k, var in old.variables.items():
        nv = new[k]
        if var.dims != nv.dims:
            raise CannotAppend(f"{name}.{k}: dims {nv.dims} against stored {var.dims}")
        if var.shape[1:] != nv.shape[1:]:
            if name == "thumbnails" and k == "image" and all(a >= b for a, b in zip(var.shape[1:], nv.shape[1:])):
                pad = [(0, 0)] + [(0, a - b) for a, b in zip(var.shape[1:], nv.shape[1:])]
                out[k] = nv.copy(data=np.pad(nv.values, pad))
                continue
            raise CannotAppend(f"{name}.{k}: shape {nv.shape[1:]} against stored {var.shape[1:]}")
        ok, nk = var.dtype.kind, nv.dtype.kind
        if ok in "OTUS" and nk in "OTUS":
            continue
        if ok == nk or (ok == "f" and nk in "iub") or (ok == "i" and nk == "u"):
            if var.dtype != nv.dtype:
                out[k] = nv.astype(var.dtype)
            continue
        raise CannotAppend(f"{name}.{k}: dtype {nv.dtype} against stored {var.dtype}")
    return out


def append_groups(path: str | os.PathLike, appended: dict[str, xr.Dataset], replaced: dict[str, xr.Dataset],
                  root_attrs: dict) -> None:
    """Append rows to a results store and replace its small groups, committing atomically.

    Parameters
    ----------
    path : path-like
        An existing results store written by :func:`pipeline.results.write_results`.
    appended : dict of str -> xarray.Dataset
        New rows per appendable group (``grains``, ``frames``, ``outlines``,
        ``thumbnails``); indices into other groups (``frame``, ``grain``)
        already offset by the stored lengths. A group with no rows may be left out.
    replaced : dict of str -> xarray.Dataset
        Groups written anew (``summary``, ...). Stored groups that are not
        appendable and not listed here are removed.
    root_attrs : dict
        The root group's attributes after this night.

    Raises
    ------
    CannotAppend
        If the rows do not fit the stored arrays; the store is unchanged.
    """
    folder = Path(path)
    docs = _metadata_docs(folder)
    held: dict = {}
    store = zarr.storage.MemoryStore(held)
    for key, doc in docs.items():
        held[key] = _buffer(json.dumps(doc).encode())
    stored_groups = {k.split("/")[0] for k in docs if k.count("/") == 1}
    root = zarr.open_group(store, mode="r+", zarr_format=3, use_consolidated=False)

    loaded_edge: set = set()
    for name, ds in appended.items():
        dim = APPEND_DIMS[name]
        if name not in stored_groups:
            raise CannotAppend(f"group {name} is not in the store")
        if not ds.sizes.get(dim, 0):
            continue
        old = xr.open_zarr(store, group=name, consolidated=False)
        ds = _check_fits(name, old, as_stored(ds), dim)
        n_old = int(old.sizes.get(dim, 0))
        for var_name in ds.variables:
            arr = root[f"{name}/{var_name}"]
            rows = arr.chunks[0]
            want = THUMBS_PER_CHUNK if name == "thumbnails" and arr.ndim == 3 else CHUNK_ROWS[dim]
            if n_old >= want and rows < want // 4:
                raise CannotAppend(f"{name}.{var_name}: chunks of {rows} rows (a store written before chunked "
                                   "appends)")
            if n_old % rows:
                coords = (n_old // rows,) + (0,) * (arr.ndim - 1)
                key = f"{name}/{var_name}/{arr.metadata.encode_chunk_key(coords)}"
                data = _read(folder / key)
                if data is not None:
                    held[key] = _buffer(data)
                    loaded_edge.add(key)
        for var in ds.variables.values():
            var.encoding = {}
        ds.to_zarr(store, group=name, mode="a", append_dim=dim, consolidated=False, zarr_format=3)

    # replaced groups: single-chunk arrays whose chunk names alternate between the two separators
    old_arrays = {k for k in docs if k.count("/") == 2}
    for name in [g for g in stored_groups if g not in APPEND_DIMS]:
        for key in [k for k in list(held) if k.startswith(name + "/")]:
            del held[key]
        if name in root:
            del root[name]
    renamed: dict[str, bytes] = {}
    for name, ds in replaced.items():
        ds = as_stored(ds)
        for var in ds.variables.values():
            var.encoding = {"chunks": tuple(max(1, s) for s in var.shape)} if var.ndim else {}
        ds.to_zarr(store, group=name, mode="a", consolidated=False, zarr_format=3)
        for key in [k for k in list(held) if k.startswith(name + "/") and k.endswith("/" + METADATA_FILE)
                    and k.count("/") == 2]:
            doc = json.loads(held[key].to_bytes())
            prev = docs.get(key)
            sep = "." if prev is not None and _separator(prev) == "/" else "/"
            if sep != "/":
                doc["chunk_key_encoding"] = {"name": "default", "configuration": {"separator": sep}}
                held[key] = _buffer(json.dumps(doc, indent=2).encode())
                base = key[: -len(METADATA_FILE)]
                for ck in [k for k in list(held) if k.startswith(base + "c/")]:
                    renamed[base + "c" + ck[len(base) + 1:].replace("/", ".")] = held.pop(ck).to_bytes()
    root = zarr.open_group(store, mode="r+", zarr_format=3, use_consolidated=False)
    root.attrs.clear()
    root.attrs.update(root_attrs)
    consolidate(store)

    # write: chunks, then metadata documents, the root's last (the commit)
    made = {folder}
    chunks = {k: v.to_bytes() for k, v in held.items() if not k.endswith(METADATA_FILE)}
    chunks.update(renamed)
    for key, data in chunks.items():
        _write_atomic(folder.joinpath(*key.split("/")), data, made)
    meta = {k: v.to_bytes() for k, v in held.items() if k.endswith(METADATA_FILE) and k != METADATA_FILE}
    for key, data in meta.items():
        _write_atomic(folder.joinpath(*key.split("/")), data, made)
    _write_atomic(folder / METADATA_FILE, held[METADATA_FILE].to_bytes(), made)

    # after the commit: folders of arrays and groups that are gone
    now = {k for k in held if k.endswith(METADATA_FILE)}
    for key in sorted(old_arrays - now):
        shutil.rmtree(folder.joinpath(*key.split("/")[:-1]), ignore_errors=True)
    for name in stored_groups - {k.split("/")[0] for k in now if k.count("/") >= 1}:
        shutil.rmtree(folder / name, ignore_errors=True)
