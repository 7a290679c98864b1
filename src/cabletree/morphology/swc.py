"""Reading and writing SWC files (the open SWC morphology format).

Layout (Cannon, Turner, Pyapali & Wheal 1998, J Neurosci Methods 84:49-54; Ascoli,
Donohue & Halavi 2007, J Neurosci 27:9247-9251): lines starting with ``#`` are
comments; every other non-blank line is one sample with seven whitespace-separated
fields ``id type x y z radius parent`` (µm; the fifth number is a radius), the root
having parent -1.

The reader is lenient about layout and strict about content.

Accepted: comments and headers (also after the seven fields), blank lines, any
whitespace (tabs, leading and trailing spaces), CRLF, CR and mixed line endings,
integers written as floats (``12.0``), scientific notation, ids that are not
contiguous, and children listed before their parents (the samples are then stored
in depth-first order from the root, children in file order; a file that already
lists parents first keeps its order).  The original ids are kept in
``Morphology.sample_id``.  Type codes other than 1-4 are kept as they are, with a
:class:`SwcWarning` and a note.

Rejected with :class:`~cabletree.errors.SwcFormatError` naming the file and line:
a field that is not a number, a line without exactly seven fields, an id, type or
parent that is not an integer, non-finite coordinates, duplicate ids, a parent id
that does not exist, cycles, more than one root, a root that is not a soma when a
soma is required, a soma without a usable radius, and neurite radii that are zero,
negative or NaN (unless :class:`~cabletree.morphology.repair.Repairs` fixes them).

The soma is derived as described in :mod:`cabletree.morphology.soma`.
"""

from __future__ import annotations

import os
import re
import warnings
from pathlib import Path

import numpy as np

from ..errors import MorphologyError, SwcFormatError
from ..fileio import write_atomically
from .repair import Repairs, clamp_min_radius, halve_radii, merge_zero_length_samples
from .samples import Morphology
from .soma import make_morphology, soma_mask

__all__ = ["SwcWarning", "read_swc", "parse_swc_text", "format_swc", "write_swc"]

_LINE_BREAK = re.compile(r"\r\n|\r|\n")
_FIELD_NAMES = ("id", "type", "x", "y", "z", "radius", "parent")
_STANDARD_TYPES = (1, 2, 3, 4)


class SwcWarning(UserWarning):
    """Something unusual but acceptable was found in an SWC file."""


def _field_error(rows: list[list[str]], numbers: list[int], source: str) -> SwcFormatError:
    """The error for the first field that is not a number."""
    for fields, number in zip(rows, numbers):
        for name, field in zip(_FIELD_NAMES, fields):
            try:
                if "_" in field:  # float() would accept digit separators
                    raise ValueError(field)
                float(field)
            except ValueError:
                return SwcFormatError(f"field {name!r} is not a number: {field!r}", source, number)
    return SwcFormatError("a field is not a number", source)  # pragma: no cover


def _parse_lines(text: str, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Rows of seven floats and their 1-based line numbers."""
    rows: list[list[str]] = []
    numbers: list[int] = []
    for number, raw in enumerate(_LINE_BREAK.split(text), start=1):
        fields = (raw.split("#", 1)[0] if "#" in raw else raw).split()
        if not fields:
            continue
        if len(fields) != 7:
            raise SwcFormatError(
                f"expected 7 fields (id type x y z radius parent), found {len(fields)}: "
                f"{raw.strip()!r}",
                source, number,
            )
        rows.append(fields)
        numbers.append(number)
    if not rows:
        raise SwcFormatError("no samples found (only comments or blank lines)", source)
    if "_" in text and any("_" in f for fields in rows for f in fields):
        raise _field_error(rows, numbers, source)
    try:
        data = np.array(rows, dtype=float)
    except ValueError:
        raise _field_error(rows, numbers, source) from None
    return data, np.array(numbers, dtype=np.int64)


def _check_integers(data: np.ndarray, lines: np.ndarray, source: str) -> None:
    for col in (0, 1, 6):
        values = data[:, col]
        bad = np.nonzero(~np.isfinite(values) | (values != np.round(values)))[0]
        if bad.size:
            k = bad[0]
            raise SwcFormatError(
                f"field {_FIELD_NAMES[col]!r} must be an integer, found {float(values[k])!r}",
                source, int(lines[k]),
            )
    bad = np.nonzero(~np.all(np.isfinite(data[:, 2:5]), axis=1))[0]
    if bad.size:
        raise SwcFormatError(
            f"coordinates must be finite numbers of µm, found {tuple(data[bad[0], 2:5].tolist())}",
            source, int(lines[bad[0]]),
        )


def _parent_rows(ids: np.ndarray, parents: np.ndarray, lines: np.ndarray, source: str) -> np.ndarray:
    """Row of each sample's parent (-1 for the root); checks ids, parents, roots."""
    order = np.argsort(ids, kind="stable")
    sorted_ids = ids[order]
    dup = np.nonzero(sorted_ids[1:] == sorted_ids[:-1])[0]
    if dup.size:
        second = order[dup + 1]
        k = int(second[np.argmin(second)])
        first = int(order[np.searchsorted(sorted_ids, ids[k])])
        raise SwcFormatError(
            f"duplicate sample id {int(ids[k])} (already defined on line {int(lines[first])}); "
            "ids must be unique",
            source, int(lines[k]),
        )
    is_root = parents == -1
    pos = np.searchsorted(sorted_ids, parents)
    pos = np.minimum(pos, len(ids) - 1)
    found = sorted_ids[pos] == parents
    missing = np.nonzero(~found & ~is_root)[0]
    if missing.size:
        k = int(missing[0])
        raise SwcFormatError(
            f"sample id {int(ids[k])} has parent id {int(parents[k])}, which does not exist "
            "(expected an id defined in the file, or -1 for the root)",
            source, int(lines[k]),
        )
    roots = np.nonzero(is_root)[0]
    if roots.size > 1:
        raise SwcFormatError(
            f"sample id {int(ids[roots[1]])} is a second root (parent -1; the first is id "
            f"{int(ids[roots[0]])} on line {int(lines[roots[0]])}); expected exactly one root",
            source, int(lines[roots[1]]),
        )
    return np.where(is_root, -1, order[pos])


def _raise_cycle(start: int, parent_row: np.ndarray, ids, lines, source: str) -> None:
    seen: dict[int, int] = {}
    k = start
    while k not in seen and k >= 0:
        seen[k] = len(seen)
        k = int(parent_row[k])
    cycle = [r for r, step in seen.items() if step >= seen[k]]
    first = min(cycle, key=lambda r: lines[r])
    chain = " -> ".join(str(int(ids[r])) for r in cycle[:12])
    raise SwcFormatError(
        f"the parent links form a cycle through sample ids {chain}"
        f"{' ...' if len(cycle) > 12 else ''}; a morphology must be a tree",
        source, int(lines[first]),
    )


def _storage_order(parent_row: np.ndarray, ids, lines, source: str) -> np.ndarray:
    """File rows in parents-first order (file order kept when already parents first)."""
    n = len(parent_row)
    roots = np.nonzero(parent_row < 0)[0]
    if roots.size == 0:
        _raise_cycle(0, parent_row, ids, lines, source)
    if roots[0] == 0 and np.all(parent_row[1:] < np.arange(1, n)):
        return np.arange(n)
    kids_order = np.argsort(parent_row, kind="stable")
    counts = np.bincount(parent_row[parent_row >= 0], minlength=n)
    starts = np.concatenate(([0], np.cumsum(counts)))
    kids_order = kids_order[n - counts.sum():]  # drop the root (parent -1 sorts first)
    out = np.empty(n, dtype=np.int64)
    stack = [int(roots[0])]
    m = 0
    while stack:
        r = stack.pop()
        out[m] = r
        m += 1
        stack.extend(kids_order[starts[r]:starts[r + 1]][::-1].tolist())
    if m < n:
        visited = np.zeros(n, dtype=bool)
        visited[out[:m]] = True
        _raise_cycle(int(np.nonzero(~visited)[0][0]), parent_row, ids, lines, source)
    return out


def _type_notes(types: np.ndarray, lines: np.ndarray, source: str) -> list[str]:
    notes = []
    for code in np.unique(types):
        if int(code) in _STANDARD_TYPES:
            continue
        where = np.nonzero(types == code)[0]
        msg = (
            f"{source}, line {int(lines[where[0]])}: SWC type code {int(code)} is not one "
            f"of the standard codes 1-4; kept as a custom type ({where.size} sample(s))"
        )
        warnings.warn(msg, SwcWarning, stacklevel=4)
        notes.append(msg)
    return notes


def parse_swc_text(
    text: str,
    source: str = "<string>",
    *,
    repairs: Repairs | None = None,
    require_soma: bool = True,
) -> Morphology:
    """Parse the text of an SWC file into a :class:`Morphology`.

    Parameters
    ----------
    text : str
        The file's content.
    source : str
        Name used in messages and kept as ``Morphology.source``.
    repairs : Repairs, optional
        Opt-in repairs (none by default).
    require_soma : bool
        Reject a file whose root is not a soma (type-1) sample.

    Returns
    -------
    Morphology
        Positions and radii in µm, parents first, original ids kept.

    Raises
    ------
    SwcFormatError
        With the file and line of the first problem (see the module doc).
    """
    repairs = repairs or Repairs()
    data, file_lines = _parse_lines(text, source)
    _check_integers(data, file_lines, source)
    file_ids = data[:, 0].astype(np.int64)
    parent_row = _parent_rows(file_ids, data[:, 6].astype(np.int64), file_lines, source)
    order = _storage_order(parent_row, file_ids, file_lines, source)
    position = np.empty_like(order)
    position[order] = np.arange(len(order))
    parent_of_row = parent_row[order]
    parent_index = np.where(parent_of_row < 0, -1, position[np.maximum(parent_of_row, 0)])
    sample_id = file_ids[order]
    swc_type = data[order, 1].astype(np.int64)
    xyz = data[order, 2:5]
    radius = data[order, 5]
    lines = file_lines[order]

    notes = _type_notes(swc_type, lines, source)
    if require_soma and swc_type[0] != 1:
        raise SwcFormatError(
            f"no soma: the root (sample id {int(sample_id[0])}) has SWC type {int(swc_type[0])}, "
            "expected 1 (soma); pass require_soma=False to read a cable without soma",
            source, int(lines[0]),
        )
    if repairs.radius_is_diameter:
        radius, note = halve_radii(radius)
        notes.append(note)
    if repairs.min_radius_um is not None:
        radius, note = clamp_min_radius(radius, swc_type, parent_index, sample_id, repairs.min_radius_um)
        if note:
            notes.append(note)
    neurite = ~soma_mask(swc_type, parent_index)
    bad = np.nonzero(neurite & ~(radius > 0))[0]
    if bad.size:
        k = int(bad[0])
        raise SwcFormatError(
            f"sample id {int(sample_id[k])} has radius {float(radius[k])!r} µm; neurite radii must be "
            f"positive ({bad.size} such sample(s); Repairs(min_radius_um=...) raises them)",
            source, int(lines[k]),
        )
    try:
        morph = make_morphology(
            sample_id, swc_type, xyz, radius, parent_index,
            source=source, notes=tuple(notes),
            soma_radius_um=repairs.soma_radius_um,
            infer_soma_radius=repairs.infer_soma_radius,
            require_soma=require_soma,
        )
    except SwcFormatError:
        raise
    except MorphologyError as err:
        message = str(err).removeprefix(f"{source}: ")
        raise SwcFormatError(message, source, int(lines[0])) from err
    if repairs.merge_zero_length:
        morph = merge_zero_length_samples(morph, repairs.zero_length_tolerance_um)
    return morph


def read_swc(
    path: str | os.PathLike,
    *,
    repairs: Repairs | None = None,
    require_soma: bool = True,
) -> Morphology:
    """Read an SWC file.

    Parameters
    ----------
    path : str or path-like
        The file.
    repairs : Repairs, optional
        Opt-in repairs (none by default).
    require_soma : bool
        Reject a file whose root is not a soma (type-1) sample.

    Returns
    -------
    Morphology
        Positions and radii in µm; ``source`` is the path.

    Raises
    ------
    SwcFormatError
        If the file cannot be read or parsed (file and line are named).
    """
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as err:
        raise SwcFormatError(f"cannot read the file: {err.strerror}", source) from err
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
    return parse_swc_text(text, source, repairs=repairs, require_soma=require_soma)


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("cabletree")
    except Exception:  # not installed: still write a valid header
        return "unknown"


def format_swc(morph: Morphology) -> str:
    """The SWC text of a morphology, with a provenance header.

    Numbers are written with Python's shortest round-trip representation, so reading
    the text back gives bit-identical arrays.

    Parameters
    ----------
    morph : Morphology
        The morphology (positions and radii in µm).

    Returns
    -------
    str
        SWC text with ``\\n`` line endings.
    """
    header = [
        f"# SWC file generated by cabletree {_version()}",
        f"# source: {morph.source}",
    ]
    if morph.has_soma:
        c = morph.soma_center_um
        header.append(
            f"# soma: {morph.soma_kind}, centre ({c[0]:g}, {c[1]:g}, {c[2]:g}) um, "
            f"radius {morph.soma_radius_um:g} um"
        )
    else:
        header.append("# soma: none")
    header += [f"# note: {' '.join(note.split())}" for note in morph.notes]
    header.append("# columns: id type x y z radius parent (um; radius, not diameter)")
    ids = morph.sample_id
    parent_ids = np.where(morph.parent_index < 0, -1, ids[np.maximum(morph.parent_index, 0)])
    body = [
        f"{int(i)} {int(t)} {float(x)!r} {float(y)!r} {float(z)!r} {float(r)!r} {int(p)}"
        for i, t, (x, y, z), r, p in zip(
            ids.tolist(), morph.swc_type.tolist(), morph.xyz_um.tolist(),
            morph.radius_um.tolist(), parent_ids.tolist(),
        )
    ]
    return "\n".join(header + body) + "\n"


def write_swc(morph: Morphology, path: str | os.PathLike) -> Path:
    """Write a morphology as an SWC file, atomically.

    The text goes to a temporary file in the same folder, which is then renamed
    over ``path``; an interrupted write leaves no half-written file.

    Parameters
    ----------
    morph : Morphology
        The morphology.
    path : str or path-like
        Destination file.

    Returns
    -------
    Path
        The written path.
    """
    target = Path(path)
    text = format_swc(morph)

    def write(tmp: Path) -> None:
        with open(tmp, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())

    return write_atomically(target, write)
