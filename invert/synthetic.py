"""Synthetic pick tables: a stated true model, a survey layout and seeded noise.

Used for planning surveys, for the demo, the case studies and the tests. The
description is a TOML file of our own layout (docs/synthetic.md):

```toml
title = "synthetic refraction line"
units = "m"
seed = 7
[model]                      # the true model
thickness = [4.0, 10.0]
vp = [400.0, 1600.0, 3000.0]
vpvs = [2.5, 4.0, 2.0]       # or vs = [...]; gradient = [...] optional
[survey]
kind = "line"                # "line", "borehole", "network" or "global"
...
[output]
picks = "picks.csv"
```

``kind = "global"`` puts the layers on a spherical planet (:func:`global_survey`).
"""

from __future__ import annotations

import difflib

import tomllib
from pathlib import Path

import numpy as np

from .config import ConfigError
from .data import read_picks, write_picks
from .forward import predict
from .model import LayerModel

SURVEY_KINDS = ("line", "borehole", "network", "global")

#: Keys of ``[survey]`` read for each kind (:func:`layout`, :func:`network`, :func:`global_survey`).
SURVEY_KEYS = {
    "line": frozenset({"kind", "shots", "receivers", "source_depth", "waves", "branches", "sigma"}),
    "borehole": frozenset({"kind", "offsets", "depths", "source_depth", "waves", "branches", "sigma"}),
    "network": frozenset({"kind", "events", "stations", "waves", "sigma", "hide_depth", "hide_origin_time"}),
    "global": frozenset({"kind", "events", "stations", "planet_radius", "max_diffraction", "waves", "sigma"}),
}


def _unknown_keys(keys, allowed) -> str:
    """'unknown key(s) ...' with a "did you mean" for near misses, as for run descriptions ("" if none)."""
    unknown = sorted(set(keys) - set(allowed))
    if not unknown:
        return ""
    hints = []
    for key in unknown:
        close = difflib.get_close_matches(key, sorted(allowed), n=1)
        hints.append(f"{key!r}" + (f" (did you mean {close[0]!r}?)" if close else ""))
    return f"unknown key(s) {', '.join(hints)}; allowed: {', '.join(sorted(allowed))}"


def model_from_table(table: dict, where: str = "model") -> LayerModel:
    """LayerModel from ``thickness``, ``vp``, ``vpvs`` or ``vs``, optional ``gradient`` lists."""
    allowed = {"thickness", "vp", "vpvs", "vs", "gradient"}
    message = _unknown_keys(table, allowed)
    if message:
        raise ValueError(f"[{where}] {message}")
    for key in ("thickness", "vp"):
        if key not in table:
            raise ValueError(f"[{where}] missing {key!r}")
    return LayerModel.build(table["thickness"], table["vp"], vs=table.get("vs"), vpvs=table.get("vpvs"),
                            gradient=table.get("gradient"))


def _span(spec, where: str) -> np.ndarray:
    if isinstance(spec, list):
        return np.asarray(spec, dtype=float)
    if isinstance(spec, dict) and {"first", "last", "spacing"} <= set(spec):
        n = int(round((spec["last"] - spec["first"]) / spec["spacing"])) + 1
        return spec["first"] + spec["spacing"] * np.arange(n)
    raise ValueError(f"{where}: expected a list of numbers or {{ first = ..., last = ..., spacing = ... }}")


def _branches(survey: dict) -> list[tuple[str, int]]:
    out = []
    for b in survey.get("branches", ["first"]):
        name, _, k = str(b).partition(":")
        if name not in ("first", "direct", "head", "reflection"):
            raise ValueError(f"[survey] branches: unknown branch {b!r} (first, direct, head:K, reflection:K)")
        if name in ("head", "reflection") and not k.isdigit():
            raise ValueError(f"[survey] branches: {b!r} needs an interface number, e.g. '{name}:2'")
        out.append((name, int(k) if k else 0))
    return out


def _sigma(survey: dict, wave: np.ndarray) -> np.ndarray:
    sig = survey.get("sigma", 0.001)
    if isinstance(sig, dict):
        missing = set(np.unique(wave)) - set(sig)
        if missing:
            raise ValueError(f"[survey] sigma: no value for wave(s) {', '.join(sorted(missing))}")
        return np.array([float(sig[w]) for w in wave])
    return np.full(wave.shape, float(sig))


def layout(survey: dict) -> dict[str, np.ndarray]:
    """Pick geometry columns of a survey description (no times yet).

    Kinds: ``line`` (surface shots ``shots`` into receivers ``receivers``
    along a line, positions in length units), ``borehole`` (sources at
    horizontal ``offsets`` from a hole and depth ``source_depth``, receivers
    at ``depths`` down the hole), ``network`` (handled by :func:`network`).
    """
    kind = survey.get("kind")
    waves = survey.get("waves", ["P"])
    rows = []
    if kind == "line":
        shots = _span(survey.get("shots"), "[survey] shots")
        recs = _span(survey.get("receivers"), "[survey] receivers")
        zs = float(survey.get("source_depth", 0.0))
        for i, s in enumerate(shots):
            for j, r in enumerate(recs):
                if abs(r - s) == 0 and zs == 0:
                    continue
                rows.append((f"shot{i + 1}", f"g{j + 1:03d}", abs(r - s), zs, 0.0))
    elif kind == "borehole":
        offsets = _span(survey.get("offsets", [0.0]), "[survey] offsets")
        depths = _span(survey.get("depths"), "[survey] depths")
        zs = float(survey.get("source_depth", 0.0))
        for i, x in enumerate(offsets):
            for j, z in enumerate(depths):
                rows.append((f"src{i + 1}", f"level{j + 1:03d}", x, zs, z))
    else:
        raise ValueError(f"[survey] kind: expected one of {', '.join(SURVEY_KINDS)}, got {kind!r}")
    cols = {k: [] for k in ("source", "receiver", "wave", "branch", "interface", "distance", "source_depth",
                            "receiver_depth")}
    for wave in waves:
        for name, k in _branches(survey):
            for src, rec, x, zs_, zr in rows:
                for key, val in zip(cols, (src, rec, wave, name, k, x, zs_, zr)):
                    cols[key].append(val)
    return {k: np.asarray(v) for k, v in cols.items()}


def synthesize(model: LayerModel, columns: dict, sigma, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Add times (true travel time + N(0, sigma^2) noise) to layout columns; drops nothing.

    Raises ValueError naming the first pick whose branch does not exist in the model.
    """
    t = predict(model, columns["wave"], columns["branch"], columns["interface"], columns["distance"],
                columns["source_depth"], columns["receiver_depth"])[0]
    bad = ~np.isfinite(t)
    if bad.any():
        j = int(np.argmax(bad))
        raise ValueError(f"no {columns['wave'][j]} {columns['branch'][j]} arrival exists at distance "
                         f"{columns['distance'][j]:g} (source {columns['source'][j]}, receiver {columns['receiver'][j]})"
                         " in the true model; remove that branch or range from the survey")
    sigma = np.broadcast_to(np.asarray(sigma, dtype=float), t.shape)
    out = dict(columns)
    out["time"] = t + rng.standard_normal(t.shape) * sigma
    out["sigma"] = np.array(sigma)
    return out


def network(model: LayerModel, survey: dict, rng: np.random.Generator, folder: Path, picks_name: str,
            comment: str) -> None:
    """Local earthquake network: events with depth and origin time, stations at the surface.

    Writes the picks with ``sources.csv`` and ``receivers.csv`` tables. Keys
    ``hide_depth`` and ``hide_origin_time`` (default true) leave those columns
    empty, so that the inversion must treat them as unknown.
    """
    ev = survey.get("events")
    st = survey.get("stations")
    if not isinstance(ev, list) or not isinstance(st, list):
        raise ValueError("[survey] network needs 'events' and 'stations' lists of tables "
                         "({ name, x, y, depth, origin_time } and { name, x, y })")
    waves = survey.get("waves", ["P", "S"])
    rows = {k: [] for k in ("source", "receiver", "wave", "branch", "interface", "distance", "source_depth",
                            "receiver_depth")}
    for e in ev:
        for s in st:
            for w in waves:
                d = float(np.hypot(e["x"] - s["x"], e["y"] - s["y"]))
                for key, val in zip(rows, (e["name"], s["name"], w, "first", 0, d, float(e["depth"]),
                                           float(s.get("depth", 0.0)))):
                    rows[key].append(val)
    cols = {k: np.asarray(v) for k, v in rows.items()}
    synth = synthesize(model, cols, _sigma(survey, cols["wave"]), rng)
    origin = {e["name"]: float(e.get("origin_time", 0.0)) for e in ev}
    synth["time"] = synth["time"] + np.array([origin[s] for s in synth["source"]])
    hide_depth = survey.get("hide_depth", True)
    hide_origin = survey.get("hide_origin_time", True)
    src_lines = ["source,x,y,depth,origin_time"]
    for e in ev:
        src_lines.append(f"{e['name']},{float(e['x'])!r},{float(e['y'])!r},"
                         f"{'' if hide_depth else repr(float(e['depth']))},"
                         f"{'' if hide_origin else repr(origin[e['name']])}")
    rec_lines = ["receiver,x,y,depth"] + [f"{s['name']},{float(s['x'])!r},{float(s['y'])!r},{float(s.get('depth', 0.0))!r}"
                                          for s in st]
    pick_lines = [f"# {comment}", "source,receiver,wave,time,sigma"]
    for j in range(synth["time"].size):
        pick_lines.append(f"{synth['source'][j]},{synth['receiver'][j]},{synth['wave'][j]},"
                          f"{float(synth['time'][j])!r},{float(synth['sigma'][j])!r}")
    from .run import write_atomic

    write_atomic(folder / "sources.csv", "\n".join(src_lines) + "\n")
    write_atomic(folder / "receivers.csv", "\n".join(rec_lines) + "\n")
    write_atomic(folder / picks_name, "\n".join(pick_lines) + "\n")
    read_picks(folder / picks_name, folder / "sources.csv", folder / "receivers.csv")  # validate what was written


def global_survey(model: LayerModel, survey: dict, rng: np.random.Generator, folder: Path, picks_name: str,
                  comment: str) -> None:
    """Events and stations on a spherical planet: first arrivals through the spherical engine.

    The layers of ``model`` are shells from the surface down
    (:meth:`invert.sphere.RadialModel.from_layers`: the half-space fills the
    planet to its centre). Keys: ``planet_radius`` [km], ``events = [{ name,
    lon, lat, depth }, ...]``, ``stations = [{ name, lon, lat }, ...]``
    (optional ``depth``), ``waves``, ``sigma``, ``max_diffraction`` [deg]
    (default inf). Distances are great-circle arcs along the surface,
    written inline in km. Every origin time is 0. A station in the shadow of
    the core for a wave (no first arrival of that wave in the true model) gets
    no pick: such pairs are listed in the comment lines of the picks file,
    not dropped silently.
    """
    from . import sphere

    ev = survey.get("events")
    st = survey.get("stations")
    if not isinstance(ev, list) or not isinstance(st, list) or not ev or not st:
        raise ValueError("[survey] global needs 'events' and 'stations' lists of tables "
                         "({ name, lon, lat, depth } and { name, lon, lat })")
    radius = survey.get("planet_radius")
    if not isinstance(radius, (int, float)) or isinstance(radius, bool) or not radius > 0:
        raise ValueError(f"[survey] planet_radius: expected the planet radius in km, got {radius!r}")
    radius = float(radius)
    dmax = float(survey.get("max_diffraction", np.inf))
    waves = survey.get("waves", ["P", "S"])
    planet = sphere.RadialModel.from_layers(model, radius)
    rows = {k: [] for k in ("source", "receiver", "wave", "distance", "source_depth", "receiver_depth")}
    angles = []
    for e in ev:
        for s in st:
            angle = float(sphere.epicentral_distance(e["lon"], e["lat"], s["lon"], s["lat"]))
            for w in waves:
                for key, val in zip(rows, (e["name"], s["name"], w, np.radians(angle) * radius, float(e["depth"]),
                                           float(s.get("depth", 0.0)))):
                    rows[key].append(val)
                angles.append(angle)
    cols = {k: np.asarray(v) for k, v in rows.items()}
    angles = np.asarray(angles)
    t = np.empty(angles.size)
    for w in np.unique(cols["wave"]):
        sel = cols["wave"] == w
        t[sel] = sphere.travel_times(planet, str(w), angles[sel], cols["source_depth"][sel],
                                     cols["receiver_depth"][sel], max_diffraction=dmax).time[0]
    sigma = _sigma(survey, cols["wave"])
    noisy = t + rng.standard_normal(t.shape) * sigma
    keep = np.isfinite(t)
    lines = [comment,
             f"spherical planet of radius {radius:g} km (shells from the surface down; half-space to the centre); "
             f"distance = great-circle arc along the surface [km]; diffracted waves counted up to "
             f"{dmax:g} deg along the core boundary"]
    absent = [f"{cols['source'][j]}-{cols['receiver'][j]} {cols['wave'][j]} ({angles[j]:.1f} deg)"
              for j in np.flatnonzero(~keep)]
    if absent:
        lines.append(f"no first arrival in the true model (not written, {len(absent)}): " + ", ".join(absent))
    out = {k: v[keep] for k, v in cols.items()}
    out["branch"] = np.full(int(keep.sum()), "first")
    out["interface"] = np.zeros(int(keep.sum()), dtype=int)
    out["time"] = noisy[keep]
    out["sigma"] = np.asarray(sigma, dtype=float)[keep]
    write_picks(folder / picks_name, out, comment="\n".join(lines))


def make_synthetic(spec_path) -> Path:
    """Write the synthetic pick table(s) described by ``spec_path``; returns the picks path."""
    spec_path = Path(spec_path)
    if not spec_path.exists():
        raise ConfigError(spec_path, "", "file not found")
    with open(spec_path, "rb") as fh:
        try:
            spec = tomllib.load(fh)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(spec_path, "", f"not valid TOML: {exc}") from None
    allowed = {"title", "units", "seed", "model", "survey", "output"}
    message = _unknown_keys(spec, allowed)
    if message:
        raise ConfigError(spec_path, "", message)
    if isinstance(spec.get("output"), dict) and _unknown_keys(spec["output"], {"picks"}):
        raise ConfigError(spec_path, "output", _unknown_keys(spec["output"], {"picks"}))
    survey = spec.get("survey", {})
    if isinstance(survey, dict) and survey.get("kind") in SURVEY_KEYS:
        message = _unknown_keys(survey, SURVEY_KEYS[survey["kind"]])
        if message:
            raise ConfigError(spec_path, "survey", f"{message} (for kind = {survey['kind']!r})")
    try:
        model = model_from_table(spec.get("model", {}))
        rng = np.random.default_rng(int(spec.get("seed", 0)))
        out = spec.get("output", {})
        folder = spec_path.parent
        picks_name = out.get("picks", "picks.csv")
        comment = (f"synthetic picks: {spec.get('title', spec_path.stem)}; true model in {spec_path.name}; "
                   f"seed {int(spec.get('seed', 0))}")
        if survey.get("kind") == "network":
            network(model, survey, rng, folder, picks_name, comment)
            return folder / picks_name
        if survey.get("kind") == "global":
            global_survey(model, survey, rng, folder, picks_name, comment)
            return folder / picks_name
        cols = layout(survey)
        synth = synthesize(model, cols, _sigma(survey, cols["wave"]), rng)
        write_picks(folder / picks_name, synth, comment=comment)
        return folder / picks_name
    except (ValueError, KeyError, TypeError) as exc:
        raise ConfigError(spec_path, "", str(exc)) from None
