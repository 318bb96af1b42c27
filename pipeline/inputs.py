"""Finding a workflow's input files: globs and folders, resolved paths, no symlink loops.

Every file is returned under its resolved path (absolute, ``..`` and
symbolic links resolved, as :func:`os.path.realpath` gives it), so the same
file under two spellings (``data/x.tif`` and ``workflows/../data/x.tif``, or
through a linked folder) is one file. Patterns follow :mod:`glob`: ``*``,
``?`` and ``[...]`` within one path component, ``**`` for any number of
folders (names starting with a dot are skipped unless the pattern names
them). Unlike :func:`glob.glob`, a folder reached a second time through a
symbolic link (a link back to a parent: a loop) is not entered again.
"""

from __future__ import annotations

import fnmatch
import glob
import os
import re
from dataclasses import dataclass, field

@dataclass
class FoundInputs:
    """What the input patterns found.

    Attributes
    ----------
    files : list of str
        Resolved paths, without duplicates, in order: patterns in the
        order given, files of one pattern sorted.
    root_of : dict of str -> int
        Index (into the patterns) of the pattern that first found each file.
    per_root : list of list of str
        Resolved files found by each pattern (duplicates across patterns kept).
    unmatched : list of int
        Indices of the patterns that matched no file.
    in_folders : set of str
        Resolved files found inside a folder (named, or matched by a
        pattern) rather than named or matched themselves: the runner passes
        over those that no reader recognises (a README beside the frames).
    """

    files: list = field(default_factory=list)
    in_folders: set = field(default_factory=set)
    root_of: dict = field(default_factory=dict)
    per_root: list = field(default_factory=list)
    unmatched: list = field(default_factory=list)


class _Plain(str):
    """A path found by a directory scan that is known not to be a symbolic link."""


class _Resolver:
    """``os.path.realpath`` of files, with the folders' resolutions cached.

    A file itself costs one ``lstat`` (is it a link?), or none when the
    directory scan that found it already said it is not (:class:`_Plain`).
    """

    def __init__(self):
        self._dirs: dict[str, str] = {}

    def __call__(self, path: str) -> str:
        head, name = os.path.split(os.path.abspath(path))
        real_dir = self._dirs.get(head)
        if real_dir is None:
            real_dir = self._dirs[head] = os.path.realpath(head)
        full = os.path.join(real_dir, name)
        if isinstance(path, _Plain):
            return full
        return os.path.realpath(full) if os.path.islink(full) else full


def _split_pattern(pattern: str) -> tuple[str, list[str]]:
    """Split an absolute pattern into its literal leading folder and the remaining components."""
    parts = os.path.abspath(pattern).split(os.sep)
    base = [p for p in parts[:1]]
    rest = parts[1:]
    i = 0
    while i < len(rest) - 1 and not glob.has_magic(rest[i]):
        i += 1
    base = os.sep.join(base + rest[:i]) or os.sep
    return base, rest[i:]


def _hidden(name: str, component: str) -> bool:
    return name.startswith(".") and not component.startswith(".")


def _walk_pattern(base: str, parts: list[str], seen_dirs: set, out: list, inside: set) -> None:
    """Append to ``out`` the files under ``base`` matching the components ``parts``."""
    if not parts:
        return
    comp, rest = parts[0], parts[1:]
    if comp == "**":
        # zero folders ...
        _walk_pattern(base, rest, seen_dirs, out, inside)
        # ... or one more, then ** again; a folder met before (a loop through a link) is not entered again
        try:
            entries = sorted(os.scandir(base), key=lambda e: e.name)
        except OSError:
            return
        for e in entries:
            if _hidden(e.name, comp):
                continue
            try:
                if not e.is_dir():
                    continue
                st = e.stat()
            except OSError:
                continue
            ident = (st.st_dev, st.st_ino)
            if ident in seen_dirs:
                continue
            seen_dirs.add(ident)
            _walk_pattern(e.path, parts, seen_dirs, out, inside)
        return
    if glob.has_magic(comp):
        try:
            entries = sorted(os.scandir(base), key=lambda e: e.name)
        except OSError:
            return
        rx = re.compile(fnmatch.translate(comp))
        names = [e for e in entries if not _hidden(e.name, comp) and rx.match(e.name)]
    else:
        path = os.path.join(base, comp)
        names = [path] if os.path.lexists(path) else []
    for e in names:
        if isinstance(e, str):
            path, is_file, is_dir = e, os.path.isfile(e), os.path.isdir(e)
        else:  # a directory entry knows its type without a system call (unless it is a link)
            path = e.path
            try:
                is_file, is_dir = e.is_file(), e.is_dir()
            except OSError:
                continue
        if rest:
            if is_dir:
                _walk_pattern(path, rest, seen_dirs, out, inside)
        elif is_file:
            out.append(path if isinstance(e, str) or e.is_symlink() else _Plain(path))
        elif is_dir:  # a pattern that names folders takes the image files inside them
            out.extend(_folder_files(path, inside))


def _folder_files(folder: str, inside: set) -> list[str]:
    """Files under a folder, hidden ones left out (recursively; linked folders are not followed, as os.walk does).

    The host keeps no list of image suffixes: every file is offered to the
    readers. The files are also added to ``inside``.
    """
    found = []
    for root, dirs, names in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        found.extend(os.path.join(root, n) for n in sorted(names) if not n.startswith("."))
    inside.update(found)
    return found


def expand_pattern(pattern: str, inside: set | None = None) -> list[str]:
    """Files matched by one input entry (a file, a folder or a glob pattern), as spelled under it.

    Parameters
    ----------
    pattern : str
        Absolute path, folder or glob pattern.
    inside : set, optional
        Receives the files found inside folders (see :class:`FoundInputs`).

    Returns
    -------
    list of str
        Matching files (not yet resolved), sorted within each folder.
    """
    inside = set() if inside is None else inside
    if not glob.has_magic(pattern):
        if os.path.isdir(pattern):
            return _folder_files(pattern, inside)
        return [pattern] if os.path.isfile(pattern) else []
    base, parts = _split_pattern(pattern)
    out: list[str] = []
    seen: set = set()
    try:
        st = os.stat(base)
        seen.add((st.st_dev, st.st_ino))
    except OSError:
        return []
    _walk_pattern(base, parts, seen, out, inside)
    return out


def find_files(patterns: list[str]) -> FoundInputs:
    """Expand the workflow's ``input.paths`` into resolved files.

    Parameters
    ----------
    patterns : list of str
        Absolute files, folders or glob patterns (``**`` recurses).

    Returns
    -------
    FoundInputs
    """
    found = FoundInputs()
    resolve = _Resolver()
    seen: set = set()
    for index, pattern in enumerate(patterns):
        hits = []
        inside: set = set()
        for hit in expand_pattern(pattern, inside):
            real = resolve(hit)
            hits.append(real)
            if hit in inside:
                found.in_folders.add(real)
        hits = sorted(set(hits))
        found.per_root.append(hits)
        if not hits:
            found.unmatched.append(index)
        for real in hits:
            if real not in seen:
                seen.add(real)
                found.files.append(real)
                found.root_of[real] = index
    return found
