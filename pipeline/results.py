"""Reading and writing results stores (zarr, one xarray dataset per group).

Format decisions (see DEVELOPERS.md, "Results store"):

- zarr format 3; every group is encoded into an in-memory zarr store and
  its chunk files written out, then the store's metadata is consolidated
  once at the end, so that a plain
  ``xarray.open_zarr(path, group="grains")`` opens fast and without warnings.
  zarr warns that consolidated metadata is not yet part of the v3
  specification; we silence exactly that warning at the one place we
  consolidate. A reader that ignores consolidated metadata still finds every
  array through the ordinary ``zarr.json`` files.
- text variables are variable-length strings (numpy ``StringDType`` or
  object), never fixed-width unicode.
- a store is replaced atomically: written in full under a temporary name
  beside the target, then swapped in with two renames. Until the swap, the
  previous results stay readable; a crash between the two renames leaves
  ``<path>.previous``, which :func:`recover` restores.
"""

from __future__ import annotations

import glob
import json
import os
import shutil
import subprocess
import threading
import uuid
import warnings
from pathlib import Path

import numpy as np
import xarray as xr
import zarr

from .zarr_direct import encode_group


def text_array(values) -> np.ndarray:
    """Return ``values`` as a variable-length string array (StringDType)."""
    return np.array([("" if v is None else str(v)) for v in values], dtype=np.dtypes.StringDType())


def as_stored(ds: xr.Dataset) -> xr.Dataset:
    """``ds`` with fixed-width or object text variables as variable-length strings (as the store keeps them).

    The text variables are replaced in one ``assign`` (one merge of the dataset, not one per variable);
    the same dataset as replacing them one by one (tests/test_host_datasets.py).
    """
    changed = {name: var.copy(data=text_array(np.asarray(var.values).ravel()).reshape(var.shape))
               for name, var in ds.variables.items() if var.dtype.kind in ("U", "S", "O")}
    return ds.assign(changed) if changed else ds.copy()


_prepare = as_stored  # the name used before it was public


def consolidate(store) -> None:
    """Consolidate the store's metadata (once, after all groups are written).

    Parameters
    ----------
    store : str or zarr store
        A folder's path, or a zarr store object such as a MemoryStore.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part")
        zarr.consolidate_metadata(store)


#: Name of the metadata document of every zarr 3 group and array.
METADATA_FILE = "zarr.json"


def _spill(held: dict, folder: Path, made: set, metadata_too: bool) -> None:
    """Write the objects of an in-memory zarr store to files under ``folder`` and drop them from memory.

    Parameters
    ----------
    held : dict
        The ``store_dict`` of a ``zarr.storage.MemoryStore``: key (a
        '/'-separated path, as a local store names its files) -> buffer.
    folder : Path
        Root folder of the store on disk.
    made : set
        Folders already created (updated).
    metadata_too : bool
        Also write (and drop) the ``zarr.json`` documents; otherwise they
        stay in memory, so that the metadata can still be consolidated.
    """
    for key in [k for k in held if metadata_too or not k.endswith(METADATA_FILE)]:
        target = folder.joinpath(*key.split("/"))
        if target.parent not in made:
            target.parent.mkdir(parents=True, exist_ok=True)
            made.add(target.parent)
        target.write_bytes(held.pop(key).to_bytes())


def write_groups(path: str | os.PathLike, groups: dict[str, xr.Dataset], root_attrs: dict | None = None,
                 direct: bool = True) -> None:
    """Write datasets as groups of a new zarr store at ``path`` (not atomic).

    Each group is encoded into an in-memory zarr store and its chunks are
    then written out as plain files, named as zarr's local store names them;
    the metadata documents follow after consolidation. The result is the
    store ``xarray.Dataset.to_zarr`` writes to a folder (the test suite
    checks them identical), in about half the time: zarr's per-array cost of
    going through its event loop to the file system (about 4 ms an array on
    the development machine, a results store has about 140 arrays) is paid
    against memory. Groups of the plain kinds a run stores are encoded by
    :func:`grainhabit.zarr_direct.encode_group` (the same files again,
    without zarr's event loop: 0.30-0.45 -> 0.09-0.13 s of CPU for the
    store of ``grainhabit bench throughput --versus-script``, most of the
    rest creating its 263 files); others go through xarray. At most one group's
    chunks are held in memory at a time.

    Parameters
    ----------
    path : path-like
        Store to create; must not exist yet.
    groups : dict of str -> xarray.Dataset
        Group name to dataset.
    root_attrs : dict, optional
        Attributes of the root group; values must be JSON-serialisable.
    direct : bool
        Encode the groups that :func:`grainhabit.zarr_direct.encode_group`
        can write without xarray (default); False writes every group through
        xarray (the reference the direct encoding is tested against).

    Raises
    ------
    FileExistsError
        If ``path`` exists.
    """
    folder = Path(path)
    folder.mkdir(parents=True, exist_ok=False)
    held: dict = {}
    store = zarr.storage.MemoryStore(held)
    root = zarr.open_group(store, mode="w-", zarr_format=3)
    root.attrs.update(root_attrs or {})
    made = {folder}
    indent = zarr.config.get("json_indent")
    for name, ds in groups.items():
        stored = as_stored(ds)
        files = encode_group(stored, indent) if direct else None
        if files is None:
            stored.to_zarr(store, group=name, mode="a", zarr_format=3, consolidated=False)
        else:
            for key, data in files.items():
                held[f"{name}/{key}"] = _buffer(data)
        _spill(held, folder, made, metadata_too=False)
    consolidate(store)
    _spill(held, folder, made, metadata_too=True)


def _buffer(data: bytes):
    from zarr.core.buffer import default_buffer_prototype

    return default_buffer_prototype().buffer.from_bytes(data)


def warm_up() -> None:
    """Do once, on a few bytes in memory, what writing the first results store of a process first does.

    xarray imports its optional array libraries (dask.array, pint, ...) when
    it first builds a variable, and zarr loads its codecs and starts its
    I/O thread on the first store; in a fresh process that took about
    0.16 s of CPU on the development machine (0.1 s dask.array, 0.06 s
    pint). The run calls this in a background thread while the workers
    compute the last frames, so the consolidation after the last frame does
    not wait for it. Writes nothing to disk; the store it builds is dropped.
    """
    ds = xr.Dataset({"number": ("row", np.zeros(2)), "count": ("row", np.arange(2, dtype=np.int64)),
                     "flag": ("row", np.zeros(2, dtype=bool)), "text": ("row", text_array(["a", ""])),
                     "image": (("row", "y", "x"), np.zeros((2, 2, 2), dtype=np.uint8))},
                    coords={"row": np.array(["a", "b"], dtype=object)}, attrs={"note": "warm-up"})
    ds["number"].attrs["units"] = "nm"
    held: dict = {}
    store = zarr.storage.MemoryStore(held)
    zarr.open_group(store, mode="w-", zarr_format=3)
    as_stored(ds).to_zarr(store, group="warm", mode="a", zarr_format=3, consolidated=False)
    consolidate(store)
    xr.open_zarr(store, group="warm", chunks=None).load()


def write_results(path: str | os.PathLike, groups: dict[str, xr.Dataset], root_attrs: dict | None = None,
                  cleanup: list | None = None) -> None:
    """Write a results store atomically, replacing any store at ``path``.

    The new store is written completely under a temporary name in the same
    folder, then swapped in. Readers of the old store are never shown a half
    written one.

    Parameters
    ----------
    path : path-like
        Results store (a folder ending in ``.zarr`` by convention).
    groups : dict of str -> xarray.Dataset
        Group name to dataset (``grains``, ``frames``, ``summary``, ...).
    root_attrs : dict, optional
        Root attributes (workflow text and hash, versions, run records).
    cleanup : list, optional
        Given, the replaced store is removed without the caller waiting
        (:func:`discard`; threads the caller must join are appended to it);
        otherwise before returning.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    recover(target)
    tmp = target.with_name(f".{target.name}.writing-{uuid.uuid4().hex[:8]}")
    try:
        write_groups(tmp, groups, root_attrs)
        swap_in(tmp, target, cleanup)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


def swap_in(new: Path, target: Path, cleanup: list | None = None) -> None:
    """Replace ``target`` by the complete store ``new`` with two renames.

    The replaced store, renamed ``<target>.previous`` between the two
    renames, is removed after the second: here, or, given ``cleanup``, off
    the caller's path (:func:`discard`). Stopped before that, the next run
    finds ``<target>.previous`` beside ``target`` and removes it
    (:func:`recover`).
    """
    previous = target.with_name(target.name + ".previous")
    if previous.exists():
        shutil.rmtree(previous)
    if target.exists():
        os.replace(target, previous)
    os.replace(new, target)
    if previous.exists():
        if cleanup is None:
            shutil.rmtree(previous, ignore_errors=True)
        else:
            discard(previous, target, cleanup)


#: Name part of a replaced store's folder while it is being removed (:func:`discard`).
REMOVING = ".removing-"

#: Removal processes started by :func:`discard` that had not ended at its last call.
_REMOVERS: list = []


def discard(folder: Path, target: Path, cleanup: list) -> None:
    """Remove a replaced store's folder without waiting for it.

    Removing a store of a few hundred files took 0.05 s on an idle
    development machine and 1-2 s on a busy one (its file system discards
    the freed blocks), on the run's path after the commit. The folder is
    renamed ``.<target name>.removing-<random>`` (a name :func:`recover`
    never restores, and sweeps where it is left), then removed by a
    detached ``rm -rf`` process where the system has one: the run returns
    without waiting for it. Elsewhere a thread removes it, appended to
    ``cleanup`` for the caller to join.

    Parameters
    ----------
    folder : Path
        The folder to remove (``<target>.previous``).
    target : Path
        The results store it was replaced by (names the renamed folder).
    cleanup : list
        Threads the caller joins.
    """
    gone = target.with_name(f".{target.name}{REMOVING}{uuid.uuid4().hex[:8]}")
    try:
        os.replace(folder, gone)
    except OSError:
        gone = folder
    remover = shutil.which("rm") if os.name == "posix" else None
    if remover:
        try:
            proc = subprocess.Popen([remover, "-rf", "--", str(gone)], stdin=subprocess.DEVNULL,
                                    stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        except OSError:
            pass
        else:
            # kept until it has ended (polled at the next call), so that no unfinished process object is dropped
            _REMOVERS[:] = [p for p in _REMOVERS if p.poll() is None] + [proc]
            return
    thread = threading.Thread(target=shutil.rmtree, args=(gone,), kwargs={"ignore_errors": True},
                              name="grainhabit-remove-previous", daemon=True)
    thread.start()
    cleanup.append(thread)


def recover(path: str | os.PathLike) -> bool:
    """Restore ``<path>.previous`` if a crash happened between the two renames.

    Also removes ``<path>.previous`` beside a store (a run stopped before it
    removed it) and folders of replaced stores whose removal was cut short
    (``.<name>.removing-*``, :func:`discard`).

    Returns
    -------
    bool
        True if a previous store was restored.
    """
    target = Path(path)
    previous = target.with_name(target.name + ".previous")
    for left in target.parent.glob(f".{glob.escape(target.name)}{REMOVING}*"):
        shutil.rmtree(left, ignore_errors=True)
    if previous.exists() and not target.exists():
        os.replace(previous, target)
        return True
    if previous.exists():
        shutil.rmtree(previous, ignore_errors=True)
    return False


def list_groups(path: str | os.PathLike) -> list[str]:
    """Names of the groups in a results store."""
    return sorted(zarr.open_group(str(path), mode="r").group_keys())


def open_results(path: str | os.PathLike, load: bool = True) -> dict[str, xr.Dataset]:
    """Open every group of a results store.

    Parameters
    ----------
    path : path-like
        Results store.
    load : bool
        Load the data into memory (default) rather than keep it lazy.

    Returns
    -------
    dict of str -> xarray.Dataset
        Group name to dataset; the root attributes are under the key
        ``"/"`` as an empty dataset with the attrs.

    Raises
    ------
    ValueError
        If ``path`` is not a results store.
    """
    path = str(path)
    try:
        root = zarr.open_group(path, mode="r")
    except Exception as exc:  # zarr raises several kinds here
        raise ValueError(f"{path}: not a grainhabit results store ({exc.__class__.__name__})") from None
    out = {"/": xr.Dataset(attrs=dict(root.attrs))}
    for name in sorted(root.group_keys()):
        out[name] = open_group(path, name, load=load)
    return out


def text_as_object(ds: xr.Dataset) -> xr.Dataset:
    """``ds`` with its text variables as numpy object arrays of ``str``.

    zarr 3 with numpy 2 reads variable-length strings as numpy
    ``StringDType``, and xarray keeps that dtype for zarr stores; on such an
    array ``.astype(str)`` raises (numpy cannot cast it to a fixed width it
    does not know). Object arrays of ``str`` behave as text always has:
    ``astype(str)``, ``==``, pandas, ``np.unique``.
    """
    changed = {}
    for name, var in ds.variables.items():
        if var.dtype.kind == "T":
            changed[name] = var.copy(data=np.asarray(var.values, dtype=object))
    return ds.assign(changed) if changed else ds


def open_group(path: str | os.PathLike, group: str, load: bool = True) -> xr.Dataset:
    """One group of a results store, text variables as object arrays of ``str`` (see :func:`text_as_object`).

    Parameters
    ----------
    path : path-like
        Results store.
    group : str
        ``grains``, ``frames``, ``summary``, ...
    load : bool
        Load into memory (default); otherwise lazy, text converted when loaded.
    """
    ds = xr.open_zarr(str(path), group=group)
    if not load:
        return ds
    return text_as_object(ds.load())


def root_attrs(path: str | os.PathLike) -> dict:
    """Root attributes of a results store (JSON text attributes decoded)."""
    attrs = dict(zarr.open_group(str(path), mode="r").attrs)
    for key in ("versions", "runs"):
        if isinstance(attrs.get(key), str):
            attrs[key] = json.loads(attrs[key])
    return attrs
