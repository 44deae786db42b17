"""Picks and survey geometry: read, validate and write our CSV layout.

One row of the picks file is one arrival time: source id, receiver id, wave
(P or S), branch (``first`` by default; ``direct``, ``head`` or ``reflection``
on a numbered interface), time [s] and its standard uncertainty ``sigma`` [s].
Geometry is given either inline (``distance``, ``source_depth``,
``receiver_depth`` columns) or in a sources table and a receivers table
(x, y and depth or elevation). Depth is positive down from the datum; a
station above the datum has a negative depth. Lengths are in the length unit
of the run (metres or kilometres); the reader does not convert them.

Every problem found raises :class:`DataError`, naming the file, line and
column. Nothing is dropped, clipped or guessed. The full layout, with an
example of each survey kind, is in ``docs/data.md``.

Two consistency checks help judge whether the picks suit a 1-D model:
:func:`reciprocal_mismatch` compares times between the same two points in both
directions (equal in any medium, so a mismatch points to picking, timing or
position errors) and :func:`offset_mismatch` compares times at equal offset
and depths from different places (equal only if the structure is 1-D).
"""

from __future__ import annotations

import csv
import difflib
import io
import math
import os
import re
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

import numpy as np
from scipy.spatial import cKDTree

WAVES = ("P", "S")
BRANCHES = ("first", "direct", "head", "reflection")
#: Branches that need an ``interface`` number (interface k is the base of layer k).
INTERFACE_BRANCHES = ("head", "reflection")

PICK_REQUIRED = ("source", "receiver", "wave", "time", "sigma")
PICK_OPTIONAL = ("branch", "interface")
INLINE_GEOMETRY = ("distance", "source_depth", "receiver_depth")
PICK_COLUMNS = PICK_REQUIRED + PICK_OPTIONAL + INLINE_GEOMETRY
SOURCE_REQUIRED = ("source", "x", "y")
SOURCE_OPTIONAL = ("origin_time",)
RECEIVER_REQUIRED = ("receiver", "x", "y")
VERTICAL = ("depth", "elevation")

#: Column names other picking programs and spreadsheets use -> our column (for "did you mean" hints).
COLUMN_SYNONYMS = {"offset": "distance", "dist": "distance", "phase": "wave", "t": "time", "tt": "time",
                   "pick": "time", "traveltime": "time", "travel_time": "time", "unc": "sigma", "err": "sigma",
                   "error": "sigma", "uncertainty": "sigma", "std": "sigma", "sd": "sigma"}
#: What sigma is, for the message when the column is missing.
SIGMA_HELP = ("sigma is the standard uncertainty of each pick, in seconds like the time column (typically "
              "0.0002-0.002 s for hammer or shot refraction picks, 0.05-0.5 s for earthquake phases; common "
              "practice). Without per-pick uncertainties, give one reasonable value for every pick and set "
              "[noise] scale = \"free\" in the run description: a common multiplier of all sigmas is then "
              "sampled (docs/likelihood.md)")

# A plain decimal number: no NaN, inf, hex, underscores or thousands separators.
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\Z")
_INTEGER = re.compile(r"\+?\d+\Z")


class DataError(ValueError):
    """A problem in an input file, located by file, line and column.

    Attributes
    ----------
    path : str
        The file as the caller named it.
    line : int or None
        1-based line number in the file (None for a whole-file problem).
    column : str or None
        Column name (None for a whole-line problem).
    reason : str
        The message without the location.
    """

    def __init__(self, path, line: int | None, column: str | None, reason: str):
        self.path = str(path)
        self.line = line
        self.column = column
        self.reason = reason
        where = self.path
        if line is not None:
            where += f", line {line}"
        if column is not None:
            where += f", column '{column}'"
        super().__init__(f"{where}: {reason}")

    def __reduce__(self):
        return (type(self), (self.path, self.line, self.column, self.reason))


# ---------------------------------------------------------------------------
# The validated pick set
# ---------------------------------------------------------------------------

_PICK_FIELDS = {  # per-pick arrays and their dtypes
    "line_numbers": int, "source_id": str, "receiver_id": str, "wave": str, "branch": str,
    "interface": int, "time": float, "sigma": float, "distance": float,
    "source_depth": float, "receiver_depth": float, "source_index": int, "receiver_index": int,
}
_SOURCE_FIELDS = {
    "source_names": str, "source_x": float, "source_y": float, "source_z": float,
    "source_origin_time": float, "depth_known": bool, "epicentre_known": bool, "source_lines": int,
}
_RECEIVER_FIELDS = {
    "receiver_names": str, "receiver_x": float, "receiver_y": float, "receiver_z": float,
    "receiver_lines": int,
}


@dataclass(frozen=True, eq=False)
class PickSet:
    """Validated picks with their geometry (build with :func:`read_picks`).

    Per-pick arrays have length P (``n_picks``); per-source arrays length
    ``n_sources``; per-receiver arrays length ``n_receivers``. All arrays are
    read-only. Lengths are in the unit of the run, times in seconds; NaN marks
    an unknown value.

    Attributes
    ----------
    path : str
        Picks file, for messages.
    geometry : str
        ``"inline"`` (distances and depths in the picks file; no coordinates,
        origin times 0) or ``"tables"`` (sources and receivers tables).
    line_numbers : (P,) int
        Line of each pick in the picks file.
    source_id, receiver_id : (P,) str
    wave : (P,) str
        ``'P'`` or ``'S'``.
    branch : (P,) str
        ``'first'``, ``'direct'``, ``'head'`` or ``'reflection'``.
    interface : (P,) int
        Interface number k >= 1 (base of layer k) for head waves and
        reflections, 0 otherwise.
    time, sigma : (P,) float
        Pick time and its standard uncertainty [s]. ``time`` is on the clock of
        the source's origin time (travel time = time - origin time).
    distance : (P,) float
        Horizontal source-receiver distance [length]; NaN where the epicentre
        is unknown.
    source_depth, receiver_depth : (P,) float
        Depths below the datum [length], negative above it; NaN where unknown.
    source_index, receiver_index : (P,) int
        Index of each pick's source / receiver in the per-source / per-receiver arrays.
    source_names : (S,) str
    source_x, source_y : (S,) float
        Epicentre coordinates [length]; NaN if unknown or inline geometry.
    source_z : (S,) float
        Source depth [length], positive down; NaN if unknown.
    source_origin_time : (S,) float
        Origin time [s]; NaN if unknown (to be sampled or marginalised).
    depth_known, epicentre_known : (S,) bool
        Whether the depth / the horizontal position is fixed by the data
        files (inline geometry: always True, the distances are given).
    source_lines : (S,) int
        Line of each source in the sources table (inline: its first pick).
    receiver_names, receiver_x, receiver_y, receiver_z, receiver_lines : (R,)
        The same for receivers (receiver positions are always known;
        x and y are NaN with inline geometry).
    sources_path, receivers_path : str or None
        Geometry tables (None with inline geometry).
    notes : tuple of str
        Remarks from reading that are not errors (e.g. table rows no pick uses).
    """

    path: str
    geometry: str
    line_numbers: np.ndarray
    source_id: np.ndarray
    receiver_id: np.ndarray
    wave: np.ndarray
    branch: np.ndarray
    interface: np.ndarray
    time: np.ndarray
    sigma: np.ndarray
    distance: np.ndarray
    source_depth: np.ndarray
    receiver_depth: np.ndarray
    source_index: np.ndarray
    receiver_index: np.ndarray
    source_names: np.ndarray
    source_x: np.ndarray
    source_y: np.ndarray
    source_z: np.ndarray
    source_origin_time: np.ndarray
    depth_known: np.ndarray
    epicentre_known: np.ndarray
    source_lines: np.ndarray
    receiver_names: np.ndarray
    receiver_x: np.ndarray
    receiver_y: np.ndarray
    receiver_z: np.ndarray
    receiver_lines: np.ndarray
    sources_path: str | None = None
    receivers_path: str | None = None
    notes: tuple = ()

    def __post_init__(self):
        if self.geometry not in ("inline", "tables"):
            raise ValueError(f"geometry must be 'inline' or 'tables', got {self.geometry!r}")
        for group in (_PICK_FIELDS, _SOURCE_FIELDS, _RECEIVER_FIELDS):
            lengths = set()
            for name, dtype in group.items():
                arr = np.array(getattr(self, name), dtype=dtype)
                if arr.ndim != 1:
                    raise ValueError(f"{name}: expected a 1-D array, got shape {arr.shape}")
                arr.setflags(write=False)
                object.__setattr__(self, name, arr)
                lengths.add(arr.size)
            if len(lengths) > 1:
                raise ValueError(f"arrays of different lengths among {', '.join(group)}")
        for name, n in (("source_index", self.n_sources), ("receiver_index", self.n_receivers)):
            idx = getattr(self, name)
            if idx.size and (idx.min() < 0 or idx.max() >= n):
                raise ValueError(f"{name}: values must lie in 0..{n - 1}")
        object.__setattr__(self, "notes", tuple(self.notes))

    # ------------------------------------------------------------ counts
    @property
    def n_picks(self) -> int:
        """Number of picks P."""
        return int(self.time.size)

    @property
    def n_sources(self) -> int:
        """Number of distinct sources."""
        return int(self.source_names.size)

    @property
    def n_receivers(self) -> int:
        """Number of distinct receivers."""
        return int(self.receiver_names.size)

    # ------------------------------------------------------------ unknowns
    @property
    def origin_time_known(self) -> np.ndarray:
        """(S,) bool: whether each source's origin time is known."""
        return np.isfinite(self.source_origin_time)

    @property
    def travel_time(self) -> np.ndarray:
        """(P,) travel time = time - origin time of the pick's source [s]; NaN if unknown."""
        return self.time - self.source_origin_time[self.source_index]

    @property
    def unknown_depth_sources(self) -> list[str]:
        """Names of sources whose depth is unknown (need a depth prior in the run config)."""
        return [str(s) for s in self.source_names[~self.depth_known]]

    @property
    def unknown_epicentre_sources(self) -> list[str]:
        """Names of sources whose x, y are unknown (need an epicentre prior)."""
        return [str(s) for s in self.source_names[~self.epicentre_known]]

    @property
    def unknown_origin_sources(self) -> list[str]:
        """Names of sources whose origin time is unknown."""
        return [str(s) for s in self.source_names[~self.origin_time_known]]

    def describe(self) -> str:
        """A few lines in words: counts, geometry, unknowns that need priors, notes."""
        lines = [f"{self.n_picks} picks from {self.n_sources} sources at {self.n_receivers} receivers "
                 f"({self.path}; geometry {'inline' if self.geometry == 'inline' else 'from tables'})."]
        keys, counts = np.unique(np.char.add(np.char.add(self.wave, " "), self.branch), return_counts=True)
        lines.append("Picks by wave and branch: " + ", ".join(f"{k} {c}" for k, c in zip(keys, counts)) + ".")
        for names, what in ((self.unknown_depth_sources, "unknown depth"),
                            (self.unknown_epicentre_sources, "unknown epicentre"),
                            (self.unknown_origin_sources, "unknown origin time")):
            if names:
                shown = ", ".join(names[:8]) + (", ..." if len(names) > 8 else "")
                lines.append(f"{len(names)} source(s) with {what} ({shown}): nuisance parameters; "
                             "the run configuration must give their prior.")
        lines.extend(self.notes)
        return "\n".join(lines)

    # ------------------------------------------------------------ selection
    def subset(self, mask) -> "PickSet":
        """The picks where boolean ``mask`` (P,) is True.

        Sources and receivers no remaining pick uses are left out and the
        indices renumbered; line numbers and paths are kept.
        """
        mask = np.asarray(mask)
        if mask.dtype != bool or mask.shape != (self.n_picks,):
            raise ValueError(f"mask must be a boolean array of shape ({self.n_picks},), "
                             f"got dtype {mask.dtype} and shape {mask.shape}")
        fields = {name: getattr(self, name)[mask] for name in _PICK_FIELDS}
        for kind, group in (("source", _SOURCE_FIELDS), ("receiver", _RECEIVER_FIELDS)):
            used, new_index = np.unique(fields[f"{kind}_index"], return_inverse=True)
            fields[f"{kind}_index"] = new_index.reshape(-1)
            fields.update({name: getattr(self, name)[used] for name in group})
        return PickSet(path=self.path, geometry=self.geometry, sources_path=self.sources_path,
                       receivers_path=self.receivers_path, notes=self.notes, **fields)

    # ------------------------------------------------------------ tables
    def to_table(self, inline_geometry: bool = True) -> dict[str, np.ndarray]:
        """Columns of the picks file layout, for writing.

        Parameters
        ----------
        inline_geometry : bool
            Include ``distance``, ``source_depth`` and ``receiver_depth``.
            Inline files imply origin time 0, so this needs every distance and
            depth known and every origin time equal to 0.

        Returns
        -------
        dict of str -> (P,) array
            ``interface`` is 0 where it does not apply (written as an empty cell).
        """
        table = {"source": self.source_id, "receiver": self.receiver_id, "wave": self.wave,
                 "branch": self.branch, "interface": self.interface, "time": self.time,
                 "sigma": self.sigma}
        if inline_geometry:
            unknown = ~np.isfinite(self.distance) | ~np.isfinite(self.source_depth)
            if unknown.any():
                i = int(np.argmax(unknown))
                raise ValueError(f"pick on line {self.line_numbers[i]} has an unknown source position; "
                                 "inline geometry cannot hold it: write sources and receivers tables")
            if np.any(self.source_origin_time != 0):
                raise ValueError("inline geometry means origin time 0, but some origin times are unknown or "
                                 "not 0: write sources and receivers tables")
            table.update(distance=self.distance, source_depth=self.source_depth,
                         receiver_depth=self.receiver_depth)
        return table

    def sources_table(self) -> dict[str, np.ndarray]:
        """Columns of the sources table layout (depth form; NaN = unknown, written empty)."""
        self._need_coordinates()
        return {"source": self.source_names, "x": self.source_x, "y": self.source_y,
                "depth": self.source_z, "origin_time": self.source_origin_time}

    def receivers_table(self) -> dict[str, np.ndarray]:
        """Columns of the receivers table layout (depth form)."""
        self._need_coordinates()
        return {"receiver": self.receiver_names, "x": self.receiver_x, "y": self.receiver_y,
                "depth": self.receiver_z}

    def _need_coordinates(self) -> None:
        if self.geometry != "tables":
            raise ValueError("this pick set has inline geometry (distances, no coordinates): "
                             "it cannot be written as sources and receivers tables")


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------

def read_picks(picks_path, sources_path=None, receivers_path=None, *, datum_elevation: float = 0.0) -> PickSet:
    """Read and validate a picks file and, if given, its geometry tables.

    Parameters
    ----------
    picks_path : path
        Picks CSV (see ``docs/data.md``).
    sources_path, receivers_path : path, optional
        Sources and receivers tables; give both or neither. Needed when the
        picks file has no inline geometry columns.
    datum_elevation : float
        Elevation of the datum [length]; an ``elevation`` column value e
        becomes depth ``datum_elevation - e``. ``depth`` columns are already
        relative to the datum.

    Returns
    -------
    PickSet

    Raises
    ------
    DataError
        For any problem in the files, naming file, line and column.
    ValueError
        If only one of the two tables is given.
    """
    if (sources_path is None) != (receivers_path is None):
        raise ValueError("give both sources_path and receivers_path, or neither")
    if not math.isfinite(float(datum_elevation)):
        raise ValueError(f"datum_elevation must be a finite number, got {datum_elevation!r}")
    picks_text = _read_text(picks_path)
    tables = None
    if sources_path is not None:
        tables = (os.fspath(sources_path), _read_text(sources_path),
                  os.fspath(receivers_path), _read_text(receivers_path))
    return _picks_from_text(os.fspath(picks_path), picks_text, tables, float(datum_elevation))


def _read_text(path) -> str:
    """File contents as text with '\\n' line ends; DataError on bytes that are not UTF-8."""
    raw = Path(path).read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise DataError(os.fspath(path), line, None,
                        "the file is not UTF-8 text (save it as UTF-8 CSV)") from None
    return text.replace("\r\n", "\n").replace("\r", "\n")


@dataclass(frozen=True)
class _Table:
    """A CSV file split into header and rows; cells are stripped strings."""

    path: str
    header_line: int
    columns: tuple
    rows: tuple  # of (line number, {column: cell})


def _parse_table(path: str, text: str, kind: str, required: tuple, optional: tuple,
                 vertical: bool = False) -> _Table:
    """Split ``text`` into header and rows, checking the header and row lengths."""
    header, header_line, rows = None, 0, []
    for lineno, line in enumerate(text.split("\n"), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        try:
            cells = [c.strip() for c in next(csv.reader([line], strict=True))]
        except csv.Error as exc:
            raise DataError(path, lineno, None, f"cannot split the line into fields ({exc})") from None
        if header is None:
            header, header_line = _check_header(path, lineno, cells, kind, required, optional, vertical), lineno
            continue
        if len(cells) != len(header):
            raise DataError(path, lineno, None,
                            f"{len(cells)} fields, but the header (line {header_line}) has {len(header)} "
                            f"columns: {', '.join(header)}")
        rows.append((lineno, dict(zip(header, cells))))
    if header is None:
        raise DataError(path, None, None, f"the {kind} file is empty: expected a header row naming the "
                                          f"columns ({', '.join(required)}, ...)")
    if not rows:
        raise DataError(path, header_line, None, f"no {kind} rows after the header")
    return _Table(path, header_line, tuple(header), tuple(rows))


def _check_header(path, lineno, cells, kind, required, optional, vertical) -> list[str]:
    names = [c.lower() for c in cells]
    if len(names) == 1 and any(sep in names[0] for sep in (";", "\t")):
        raise DataError(path, lineno, None, "the header has a single column; columns must be separated "
                                            "by commas (this file seems to use ';' or tabs)")
    allowed = required + optional + (VERTICAL if vertical else ())
    for i, name in enumerate(names):
        if not name:
            raise DataError(path, lineno, None, f"header column {i + 1} has no name")
        if name in names[:i]:
            raise DataError(path, lineno, name, f"column '{name}' appears twice in the header")
    unknown = [n for n in names if n not in allowed]
    missing = [n for n in required if n not in names]
    if vertical and not any(v in names for v in VERTICAL):
        missing.append("depth")
    if missing:
        hints = []
        for m in missing:
            same = [u for u in unknown if COLUMN_SYNONYMS.get(u) == m]
            close = difflib.get_close_matches(m, unknown, n=1, cutoff=0.6)
            if same:
                hints.append(f"did you mean '{m}' for column '{same[0]}'? rename it")
            elif close:
                hints.append(f"'{close[0]}' may be a typo for '{m}'")
        shown = ", ".join("'depth' or 'elevation'" if vertical and m == "depth" else f"'{m}'" for m in missing)
        explain = f". {SIGMA_HELP}" if kind == "picks" and "sigma" in missing else ""
        raise DataError(path, lineno, missing[0],
                        f"the {kind} file lacks column(s) {shown}"
                        + (" (" + "; ".join(hints) + ")" if hints else "")
                        + f"; columns found: {', '.join(names)}" + explain)
    if vertical and all(v in names for v in VERTICAL):
        raise DataError(path, lineno, "elevation", "give either 'depth' (positive down) or 'elevation' "
                                                   "(positive up), not both")
    if unknown:
        hints = []
        for u in unknown:
            close = difflib.get_close_matches(u, allowed, n=1, cutoff=0.6)
            if COLUMN_SYNONYMS.get(u) in allowed:
                close = [COLUMN_SYNONYMS[u]]
            hints.append(f"'{u}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        raise DataError(path, lineno, unknown[0], f"unknown column(s) {', '.join(hints)}; allowed columns "
                                                  f"in a {kind} file: {', '.join(allowed)}")
    return names


def _number(path, lineno, column, text, required=True) -> float:
    """Parse one numeric cell; empty gives NaN unless ``required``."""
    if text == "":
        if required:
            raise DataError(path, lineno, column, f"{column} is missing (empty cell)")
        return math.nan
    if not _NUMBER.match(text):
        if text.lower().lstrip("+-") in ("nan", "inf", "infinity"):
            raise DataError(path, lineno, column, f"{column} must be a finite number (got '{text}')")
        raise DataError(path, lineno, column, f"{column} must be a number (got '{text}')")
    value = float(text)
    if not math.isfinite(value):
        raise DataError(path, lineno, column, f"{column} is too large (got {text})")
    return value


def _name(path, lineno, column, text) -> str:
    if not text:
        raise DataError(path, lineno, column, f"{column} id is missing (empty cell)")
    return text


@dataclass
class _Points:
    """Rows of a sources or receivers table, in file order."""

    names: list
    lines: list
    x: list
    y: list
    z: list
    origin: list
    index: dict


def _parse_points(table: _Table, kind: str, datum_elevation: float) -> _Points:
    """Validate a sources (kind 'source') or receivers (kind 'receiver') table."""
    path, is_source = table.path, kind == "source"
    pts = _Points([], [], [], [], [], [], {})
    vertical = "depth" if "depth" in table.columns else "elevation"
    has_origin = "origin_time" in table.columns
    for lineno, row in table.rows:
        name = _name(path, lineno, kind, row[kind])
        if name in pts.index:
            raise DataError(path, lineno, kind, f"{kind} id '{name}' is listed twice "
                                                f"(also on line {pts.lines[pts.index[name]]})")
        x = _number(path, lineno, "x", row["x"], required=not is_source)
        y = _number(path, lineno, "y", row["y"], required=not is_source)
        if math.isnan(x) != math.isnan(y):
            col = "x" if math.isnan(x) else "y"
            raise DataError(path, lineno, col, "give both x and y, or leave both empty for an unknown "
                                               "epicentre")
        v = _number(path, lineno, vertical, row[vertical], required=not is_source)
        z = v if vertical == "depth" else datum_elevation - v
        origin = _number(path, lineno, "origin_time", row["origin_time"], required=False) if has_origin else 0.0
        pts.index[name] = len(pts.names)
        for lst, val in ((pts.names, name), (pts.lines, lineno), (pts.x, x), (pts.y, y), (pts.z, z),
                         (pts.origin, origin)):
            lst.append(val)
    return pts


def _picks_from_text(path: str, text: str, tables, datum_elevation: float) -> PickSet:
    """Build a PickSet from the picks text and, if not None, ``tables`` =
    (sources path, sources text, receivers path, receivers text)."""
    table = _parse_table(path, text, "picks", PICK_REQUIRED, PICK_OPTIONAL + INLINE_GEOMETRY)
    present = [c for c in INLINE_GEOMETRY if c in table.columns]
    inline = bool(present)
    if present and len(present) < len(INLINE_GEOMETRY):
        lacking = [c for c in INLINE_GEOMETRY if c not in present]
        raise DataError(path, table.header_line, lacking[0],
                        f"inline geometry needs all of {', '.join(INLINE_GEOMETRY)}; missing "
                        f"{', '.join(lacking)} (or drop them all and give sources and receivers tables)")
    if inline and tables is not None:
        raise DataError(path, table.header_line, present[0],
                        "geometry is given twice: inline columns here and sources/receivers tables; "
                        "use one of the two")
    if not inline and tables is None:
        raise DataError(path, table.header_line, None,
                        f"no geometry: add columns {', '.join(INLINE_GEOMETRY)} or give sources and "
                        "receivers tables")
    sources = receivers = None
    if tables is not None:
        src_path, src_text, rec_path, rec_text = tables
        sources = _parse_points(_parse_table(src_path, src_text, "sources", SOURCE_REQUIRED,
                                             SOURCE_OPTIONAL, vertical=True), "source", datum_elevation)
        receivers = _parse_points(_parse_table(rec_path, rec_text, "receivers", RECEIVER_REQUIRED,
                                               (), vertical=True), "receiver", datum_elevation)
        table_paths = (src_path, rec_path)

    cols = {name: [] for name in ("line_numbers", "source_id", "receiver_id", "wave", "branch", "interface",
                                  "time", "sigma", "distance", "source_depth", "receiver_depth")}
    seen_pick: dict = {}
    seen_source: dict = {}   # inline: name -> (line, depth)
    seen_receiver: dict = {}
    seen_pair: dict = {}     # inline: (source, receiver) -> (line, distance)
    has_interface = "interface" in table.columns
    for lineno, row in table.rows:
        src, rec, wave, branch, iface, t, sigma = _pick_fields(path, lineno, row, has_interface)
        key = (src, rec, wave, branch, iface)
        if key in seen_pick:
            what = f"{wave} {branch}" + (f" on interface {iface}" if iface else "")
            raise DataError(path, lineno, None, f"duplicate pick: source '{src}', receiver '{rec}', {what} "
                                                f"was already given on line {seen_pick[key]}")
        seen_pick[key] = lineno
        if inline:
            dist = _number(path, lineno, "distance", row["distance"])
            if dist < 0:
                raise DataError(path, lineno, "distance", f"distance must be >= 0 (got {row['distance']})")
            zs = _number(path, lineno, "source_depth", row["source_depth"])
            zr = _number(path, lineno, "receiver_depth", row["receiver_depth"])
            _same_as_before(path, lineno, "source_depth", f"source '{src}'", seen_source, src, zs)
            _same_as_before(path, lineno, "receiver_depth", f"receiver '{rec}'", seen_receiver, rec, zr)
            _same_as_before(path, lineno, "distance", f"source '{src}' and receiver '{rec}'",
                            seen_pair, (src, rec), dist)
            origin = 0.0
        else:
            for name, pts, tpath in ((src, sources, table_paths[0]), (rec, receivers, table_paths[1])):
                if name not in pts.index:
                    kind = "source" if pts is sources else "receiver"
                    raise DataError(path, lineno, kind, f"{kind} '{name}' is not in the {kind}s table {tpath}")
            s, r = sources.index[src], receivers.index[rec]
            dist = math.hypot(sources.x[s] - receivers.x[r], sources.y[s] - receivers.y[r])
            zs, zr, origin = sources.z[s], receivers.z[r], sources.origin[s]
        if t - origin < 0:
            raise DataError(path, lineno, "time",
                            f"time {row['time']} s is before the origin time ({origin:g} s) of source '{src}'"
                            + (" (inline geometry: times are travel times from the shot)" if inline else ""))
        for name, val in (("line_numbers", lineno), ("source_id", src), ("receiver_id", rec), ("wave", wave),
                          ("branch", branch), ("interface", iface), ("time", t), ("sigma", sigma),
                          ("distance", dist), ("source_depth", zs), ("receiver_depth", zr)):
            cols[name].append(val)

    if inline:
        return _assemble_inline(path, cols, seen_source, seen_receiver)
    return _assemble_tables(path, cols, sources, receivers, table_paths)


def _pick_fields(path, lineno, row, has_interface) -> tuple:
    """Validate the non-geometry cells of one picks row."""
    src = _name(path, lineno, "source", row["source"])
    rec = _name(path, lineno, "receiver", row["receiver"])
    wave = row["wave"].upper()
    if wave not in WAVES:
        got = f"got '{row['wave']}'" if row["wave"] else "the cell is empty"
        raise DataError(path, lineno, "wave", f"wave must be P or S ({got})")
    branch = row.get("branch", "").lower() or "first"
    if branch not in BRANCHES:
        raise DataError(path, lineno, "branch", f"unknown branch '{row['branch']}'; use one of "
                                                f"{', '.join(BRANCHES)} (empty means first)")
    iface = _interface(path, lineno, row, branch, has_interface)
    t = _number(path, lineno, "time", row["time"])
    sigma = _number(path, lineno, "sigma", row["sigma"])
    if sigma <= 0:
        raise DataError(path, lineno, "sigma", f"sigma must be > 0 (got {row['sigma']})")
    return src, rec, wave, branch, iface, t, sigma


def _interface(path, lineno, row, branch, has_column) -> int:
    text = row.get("interface", "")
    if branch in INTERFACE_BRANCHES:
        if not has_column:
            raise DataError(path, lineno, "branch", f"branch '{branch}' needs an interface number, but the "
                                                    "file has no 'interface' column")
        if not text:
            raise DataError(path, lineno, "interface", f"branch '{branch}' needs an interface number "
                                                       "(k >= 1, the base of layer k)")
        if not _INTEGER.match(text) or int(text) < 1:
            raise DataError(path, lineno, "interface", f"interface must be a whole number >= 1 (got '{text}')")
        return int(text)
    if text:
        raise DataError(path, lineno, "interface", f"interface must be empty for branch '{branch}' "
                                                   f"(got '{text}'); only head and reflection picks name one")
    return 0


def _same_as_before(path, lineno, column, who, seen, key, value) -> None:
    """Inline geometry: one id (or id pair) must keep one value of ``column``."""
    if key in seen:
        first_line, first_value = seen[key]
        if value != first_value:
            raise DataError(path, lineno, column, f"{who} has {column} {value:g} here but {first_value:g} on "
                                                  f"line {first_line}")
    else:
        seen[key] = (lineno, value)


def _assemble_inline(path, cols, seen_source, seen_receiver) -> PickSet:
    src_names = list(seen_source)  # dicts keep first-appearance order
    rec_names = list(seen_receiver)
    src_pos = {n: i for i, n in enumerate(src_names)}
    rec_pos = {n: i for i, n in enumerate(rec_names)}
    ns, nr = len(src_names), len(rec_names)
    return PickSet(
        path=path, geometry="inline", **cols,
        source_index=[src_pos[s] for s in cols["source_id"]],
        receiver_index=[rec_pos[r] for r in cols["receiver_id"]],
        source_names=src_names, source_x=np.full(ns, np.nan), source_y=np.full(ns, np.nan),
        source_z=[seen_source[n][1] for n in src_names], source_origin_time=np.zeros(ns),
        depth_known=np.ones(ns, bool), epicentre_known=np.ones(ns, bool),
        source_lines=[seen_source[n][0] for n in src_names],
        receiver_names=rec_names, receiver_x=np.full(nr, np.nan), receiver_y=np.full(nr, np.nan),
        receiver_z=[seen_receiver[n][1] for n in rec_names],
        receiver_lines=[seen_receiver[n][0] for n in rec_names])


def _assemble_tables(path, cols, sources: _Points, receivers: _Points, table_paths) -> PickSet:
    fields, notes = {}, []
    for kind, pts, tpath in (("source", sources, table_paths[0]), ("receiver", receivers, table_paths[1])):
        table_index = np.array([pts.index[n] for n in cols[f"{kind}_id"]], dtype=int)
        used, compact = np.unique(table_index, return_inverse=True)  # table order
        fields[f"{kind}_index"] = compact.reshape(-1)
        for name, values in (("names", pts.names), ("lines", pts.lines), ("x", pts.x), ("y", pts.y),
                             ("z", pts.z)):
            fields[f"{kind}_{name}"] = [values[i] for i in used]
        if kind == "source":
            fields["source_origin_time"] = [pts.origin[i] for i in used]
        unused = sorted(set(range(len(pts.names))) - set(used.tolist()))
        if unused:
            listed = ", ".join(f"'{pts.names[i]}' (line {pts.lines[i]})" for i in unused[:8])
            notes.append(f"{len(unused)} {kind}(s) in {tpath} have no picks and are not used: {listed}"
                         + (", ..." if len(unused) > 8 else ""))
    sx, sz = np.asarray(fields["source_x"], float), np.asarray(fields["source_z"], float)
    return PickSet(path=path, geometry="tables", sources_path=table_paths[0], receivers_path=table_paths[1],
                   notes=tuple(notes), depth_known=np.isfinite(sz), epicentre_known=np.isfinite(sx),
                   **cols, **fields)


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------

def write_picks(path, picks, *, sources_path=None, receivers_path=None, comment: str | None = None) -> None:
    """Write picks (and optionally geometry tables) in our CSV layout.

    Every file is first validated exactly as :func:`read_picks` would read it,
    then written to a temporary file in the same folder and moved into place
    (``os.replace``), so a reader never sees a half-written file and nothing
    is written if validation fails.

    Parameters
    ----------
    path : path
        Picks file to write.
    picks : PickSet or mapping of str -> array-like
        A pick set, or columns of the picks layout with inline geometry
        (``source``, ``receiver``, ``wave``, ``time``, ``sigma``, ``distance``,
        ``source_depth``, ``receiver_depth``; optional ``branch`` and
        ``interface`` with 0 meaning none).
    sources_path, receivers_path : path, optional
        Write geometry tables here instead of inline geometry (PickSet read
        from tables only).
    comment : str, optional
        Text written as ``#`` comment lines at the top of the picks file
        (e.g. "synthetic picks: ...").

    Raises
    ------
    ValueError
        If the columns are unknown, of different lengths, or the pick set
        cannot be expressed in the requested layout; DataError if a value is
        invalid (located in the file that would have been written).
    """
    if (sources_path is None) != (receivers_path is None):
        raise ValueError("give both sources_path and receivers_path, or neither")
    with_tables = sources_path is not None
    if isinstance(picks, PickSet):
        columns = picks.to_table(inline_geometry=not with_tables)
    elif isinstance(picks, Mapping):
        if with_tables:
            raise ValueError("geometry tables can only be written from a PickSet; give inline columns")
        columns = _columns_from_mapping(picks)
    else:
        raise TypeError(f"picks must be a PickSet or a mapping of columns, got {type(picks).__name__}")
    files = [(os.fspath(path), _csv_text(columns, comment))]
    tables = None
    if with_tables:
        files.append((os.fspath(sources_path), _csv_text(picks.sources_table(), None)))
        files.append((os.fspath(receivers_path), _csv_text(picks.receivers_table(), None)))
        tables = (files[1][0], files[1][1], files[2][0], files[2][1])
    _picks_from_text(files[0][0], files[0][1], tables, 0.0)  # raises before anything is written
    for target, text in files[1:] + files[:1]:
        _write_atomic(target, text)


def _columns_from_mapping(mapping: Mapping) -> dict[str, np.ndarray]:
    unknown = [k for k in mapping if k not in PICK_COLUMNS]
    if unknown:
        raise ValueError(f"unknown column(s) {', '.join(map(repr, unknown))}; allowed: {', '.join(PICK_COLUMNS)}")
    missing = [k for k in PICK_REQUIRED + INLINE_GEOMETRY if k not in mapping]
    if missing:
        raise ValueError(f"missing column(s) {', '.join(missing)} (writing from columns needs inline geometry)")
    columns = {k: np.asarray(mapping[k]) for k in PICK_COLUMNS if k in mapping}
    lengths = {k: v.shape for k, v in columns.items()}
    if any(len(s) != 1 for s in lengths.values()) or len({s[0] for s in lengths.values()}) != 1:
        raise ValueError(f"columns must be 1-D arrays of one length, got shapes {lengths}")
    return columns


def _cell(column: str, value) -> str:
    if column in ("source", "receiver", "wave", "branch"):
        return str(value)
    if column == "interface":
        value = float(value)
        return "" if value == 0 else (str(int(value)) if value.is_integer() else repr(value))
    value = float(value)
    if math.isnan(value) and column in ("depth", "origin_time", "x", "y"):
        return ""  # tables: empty means unknown
    return repr(value)  # shortest text that reads back to the same float


def _csv_text(columns: Mapping, comment: str | None) -> str:
    out = io.StringIO()
    if comment:
        for line in comment.splitlines():
            out.write(f"# {line}\n")
    plain = csv.writer(out, lineterminator="\n")
    quoted = csv.writer(out, lineterminator="\n", quoting=csv.QUOTE_ALL)
    names = list(columns)
    plain.writerow(names)
    n = len(next(iter(columns.values())))
    for i in range(n):
        row = [_cell(c, columns[c][i]) for c in names]
        for c, cell in zip(names, row):
            if c in ("source", "receiver") and (cell != cell.strip() or "\n" in cell or "\r" in cell):
                raise ValueError(f"{c} id {cell!r} (row {i + 1}) has surrounding blanks or a line break; "
                                 "it would not read back unchanged")
        # a row whose first cell starts with '#' would read as a comment: quote it
        (quoted if row[0].startswith("#") else plain).writerow(row)
    return out.getvalue()


def _write_atomic(path: str, text: str) -> None:
    """Write ``text`` to a temporary file next to ``path`` and move it into place."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


# ---------------------------------------------------------------------------
# Consistency checks between picks
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class PickPair:
    """Two picks whose travel times should agree, with their difference.

    ``a`` and ``b`` are pick indices; times are travel times [s]; ``sigma`` is
    the combined uncertainty sqrt(sigma_a**2 + sigma_b**2) [s].
    """

    a: int
    b: int
    line_a: int
    line_b: int
    route_a: str
    route_b: str
    phase: str
    time_a: float
    time_b: float
    sigma: float

    @property
    def difference(self) -> float:
        """time_a - time_b [s]."""
        return self.time_a - self.time_b

    @property
    def misfit(self) -> float:
        """|difference| in units of the combined sigma."""
        return abs(self.difference) / self.sigma


def _default_tolerance(picks: PickSet) -> float:
    """1e-3 of the survey's size (largest coordinate, depth or distance range)."""
    values = [picks.receiver_x, picks.receiver_y, picks.receiver_z, picks.source_x, picks.source_y,
              picks.source_z]
    spans = [np.ptp(v[np.isfinite(v)]) for v in values if np.isfinite(v).any()]
    if np.isfinite(picks.distance).any():
        spans.append(np.nanmax(picks.distance))
    return 1e-3 * max(spans, default=0.0)


def _points(picks: PickSet, tolerance: float) -> tuple[np.ndarray, np.ndarray]:
    """Point number of every source and receiver (same number = same place); -1 if unknown.

    Tables: known positions within ``tolerance`` of each other (3-D, chained)
    are one point, so a shot at a geophone and a repeated shot share it.
    Inline geometry (no coordinates): a source and a receiver with the same id
    and depths within ``tolerance`` are the same point.
    """
    nr, ns = picks.n_receivers, picks.n_sources
    parent = np.arange(nr + ns)

    def root(k):
        while parent[k] != k:
            k = parent[k]
        return k

    if picks.geometry == "tables":
        known = picks.depth_known & picks.epicentre_known
        xyz = np.vstack([np.column_stack([picks.receiver_x, picks.receiver_y, picks.receiver_z]),
                         np.column_stack([picks.source_x, picks.source_y, picks.source_z])])
        members = np.concatenate([np.arange(nr), nr + np.flatnonzero(known)])
        for u, v in cKDTree(xyz[members]).query_pairs(r=tolerance, output_type="ndarray"):
            parent[root(members[u])] = root(members[v])
    else:
        known = np.ones(ns, bool)
        rec_of = {str(n): i for i, n in enumerate(picks.receiver_names)}
        for s, name in enumerate(picks.source_names):
            r = rec_of.get(str(name))
            if r is not None and abs(picks.source_z[s] - picks.receiver_z[r]) <= tolerance:
                parent[root(nr + s)] = root(r)
    roots = np.array([root(k) for k in range(nr + ns)], dtype=int)
    source_point = np.where(known, roots[nr:], -1)
    return source_point, roots[:nr]


def _comparable(picks: PickSet) -> np.ndarray:
    """(P,) bool: picks with known travel time, distance and depths."""
    return (np.isfinite(picks.travel_time) & np.isfinite(picks.distance)
            & np.isfinite(picks.source_depth) & np.isfinite(picks.receiver_depth))


def _pair(picks: PickSet, i: int, j: int) -> PickPair:
    tt = picks.travel_time

    def route(k):
        return f"{picks.source_id[k]} -> {picks.receiver_id[k]}"

    phase = f"{picks.wave[i]} {picks.branch[i]}" + (f" {picks.interface[i]}" if picks.interface[i] else "")
    return PickPair(int(i), int(j), int(picks.line_numbers[i]), int(picks.line_numbers[j]), route(i), route(j),
                    phase, float(tt[i]), float(tt[j]), float(math.hypot(picks.sigma[i], picks.sigma[j])))


def reciprocal_mismatch(picks: PickSet, tolerance: float | None = None) -> list[PickPair]:
    """Reversed pairs: a pick A -> B and a pick B -> A of the same wave and branch.

    Travel times between two points are the same in both directions in any
    medium, dipping or not: the fastest path one way is the fastest path back
    (Fermat's principle; the reciprocal time of refraction interpretation,
    common practice). These pairs therefore test the picks, the shot timing
    and the positions, not the structure.

    Parameters
    ----------
    picks : PickSet
    tolerance : float, optional
        Distance [length] within which a source and a receiver count as the
        same point; default 1e-3 of the survey's size. With inline geometry
        (no coordinates) a source and a receiver are the same point when they
        share an id and their depths agree within ``tolerance``.

    Returns
    -------
    list of PickPair
        One entry per pair; picks with an unknown origin time or position
        are not compared.
    """
    tol = _default_tolerance(picks) if tolerance is None else float(tolerance)
    src_pt, rec_pt = _points(picks, tol)
    frm, to = src_pt[picks.source_index], rec_pt[picks.receiver_index]
    ok = _comparable(picks) & (frm >= 0) & (frm != to)
    by_route: dict = {}
    for i in np.flatnonzero(ok):
        by_route.setdefault((picks.wave[i], picks.branch[i], picks.interface[i], frm[i], to[i]), []).append(i)
    pairs = []
    for (wave, branch, iface, a, b), forward in by_route.items():
        for i in forward:
            for j in by_route.get((wave, branch, iface, b, a), []):
                if i < j:
                    pairs.append(_pair(picks, i, j))
    return sorted(pairs, key=lambda p: (p.a, p.b))


def offset_mismatch(picks: PickSet, tolerance: float | None = None) -> list[PickPair]:
    """Pairs of picks at the same offset and depths but from different places.

    In a 1-D medium the travel time of a given wave and branch depends only on
    the horizontal distance and the two depths (common practice), so such
    pairs agree within their errors; up-dip and down-dip shots over a dipping
    interface, or lateral velocity changes, make them differ (Kearey, Brooks
    & Hill, An Introduction to Geophysical Exploration, 3rd ed., 2002, ch. 5,
    from memory). Reversed pairs (same two points) are left out: they agree in
    any medium.

    Parameters
    ----------
    picks : PickSet
    tolerance : float, optional
        Largest difference [length] of distance, source depth and receiver
        depth for two picks to count as the same offset and depths; default
        1e-3 of the survey's size.

    Returns
    -------
    list of PickPair
    """
    tol = _default_tolerance(picks) if tolerance is None else float(tolerance)
    src_pt, rec_pt = _points(picks, tol)
    frm, to = src_pt[picks.source_index], rec_pt[picks.receiver_index]
    ok = np.flatnonzero(_comparable(picks))
    keys = np.char.add(np.char.add(picks.wave[ok], "/" + picks.branch[ok] + "/"), picks.interface[ok].astype(str))
    pairs = []
    for key in np.unique(keys):
        idx = ok[keys == key]
        geom = np.column_stack([picks.distance[idx], picks.source_depth[idx], picks.receiver_depth[idx]])
        found = cKDTree(geom).query_pairs(r=tol, p=np.inf, output_type="ndarray")
        for u, v in found:
            i, j = sorted((int(idx[u]), int(idx[v])))
            same_points = frm[i] >= 0 and frm[j] >= 0 and (
                (frm[i] == frm[j] and to[i] == to[j]) or (frm[i] == to[j] and to[i] == frm[j]))
            if not same_points:
                pairs.append(_pair(picks, i, j))
    return sorted(pairs, key=lambda p: (p.a, p.b))


def _chance_fraction(threshold: float) -> float:
    """P(|z| > threshold) for a standard normal z."""
    return math.erfc(threshold / math.sqrt(2.0))


def _worst(pairs: list[PickPair], threshold: float, limit: int = 5) -> list[str]:
    bad = sorted((p for p in pairs if p.misfit > threshold), key=lambda p: -p.misfit)
    return [f"  line {p.line_a} ({p.route_a}) vs line {p.line_b} ({p.route_b}), {p.phase}: "
            f"{p.time_a:.6g} s vs {p.time_b:.6g} s, difference {p.difference:+.3g} s = {p.misfit:.1f} sigma"
            for p in bad[:limit]] + ([f"  ... and {len(bad) - limit} more"] if len(bad) > limit else [])


def reciprocity_message(pairs: list[PickPair], threshold: float = 3.0) -> str:
    """Say in words whether reversed pairs (from :func:`reciprocal_mismatch`) agree.

    A pair is flagged when its difference exceeds ``threshold`` combined sigma.
    """
    if not pairs:
        return ("Reciprocity: no reversed pairs (no pick has a partner with source and receiver "
                "exchanged), so shot timing and picks cannot be cross-checked this way.")
    n_bad = sum(p.misfit > threshold for p in pairs)
    worst = max(pairs, key=lambda p: p.misfit)
    if n_bad == 0:
        return (f"Reciprocity: all {len(pairs)} reversed pair(s) agree within {threshold:g} combined sigma "
                f"(largest difference {worst.difference:+.3g} s = {worst.misfit:.1f} sigma, lines "
                f"{worst.line_a} and {worst.line_b}).")
    return "\n".join([
        f"Reciprocity: {n_bad} of {len(pairs)} reversed pair(s) differ by more than {threshold:g} combined "
        f"sigma (about {len(pairs) * _chance_fraction(threshold):.2g} expected by chance):",
        *_worst(pairs, threshold),
        "Travel times between the same two points are equal in both directions in any medium, dipping or "
        "not, so these differences come from the data, not the structure: a mispicked or mislabelled "
        "trace, a trigger delay at a shot, a shot not exactly at the receiver's position (e.g. buried below "
        "it), or sigmas that are too small. Check them before inverting; structure that is not 1-D shows "
        "up in the same-offset check instead."])


def offset_message(pairs: list[PickPair], threshold: float = 3.0, level: float = 0.01) -> str:
    """Say in words whether same-offset pairs (from :func:`offset_mismatch`) agree.

    Under Gaussian pick errors a pair exceeds ``threshold`` combined sigma with
    probability q = erfc(threshold / sqrt 2) (0.27 % at 3 sigma), so among n
    pairs the count of such pairs is binomial (n, q) when the pairs are treated
    as independent. The structure is called not 1-D only when the count seen is
    improbable by chance: its binomial upper tail P(count >= seen) is below
    ``level`` (1 % by default). One pair in a handful, where far fewer than one
    is expected, is not enough.
    """
    from scipy.stats import binom

    if not pairs:
        return ("Same-offset check: no two picks from different places share offset and depths, so "
                "lateral changes cannot be detected from the picks alone.")
    n = len(pairs)
    n_bad = sum(p.misfit > threshold for p in pairs)
    q = _chance_fraction(threshold)
    expected = n * q
    tail = float(binom.sf(n_bad - 1, n, q)) if n_bad > 0 else 1.0
    mean_square = float(np.mean([p.misfit ** 2 for p in pairs]))
    stats = (f"{n_bad} of {n} same-offset pair(s) differ by more than {threshold:g} combined sigma "
             f"(about {expected:.2g} expected by chance")
    if n_bad > 0:
        stats += (f"; {n_bad} or more happen by chance alone with probability {tail:.2g}: binomial tail, "
                  "pairs treated as independent")
    stats += f"); mean squared normalised difference {mean_square:.3g} (about 1 expected)"
    if n_bad == 0:
        return f"Same-offset check: {stats}: consistent with a 1-D structure."
    if tail >= level:
        return "\n".join([
            f"Same-offset check: {stats}: not more than chance allows at the {level:.0%} level, so consistent "
            "with a 1-D structure. Largest differences (worth a look, not evidence against 1-D on their own):",
            *_worst(pairs, threshold)])
    return "\n".join([
        f"Same-offset check: {stats}: more than chance allows (below {level:.0%}). Largest differences:",
        *_worst(pairs, threshold),
        "In a 1-D structure times at the same offset and depths are equal wherever they are measured; "
        "these differences suggest dipping interfaces or lateral velocity changes, i.e. the structure is "
        "not 1-D, and a 1-D model fitted to these picks may be biased (or the sigmas are too small)."])
