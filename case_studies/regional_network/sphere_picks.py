"""The same synthetic picks as they would be on a round Earth: picks_sphere.csv.

For every pick of picks.csv this adds (spherical time - flat time) of the true model of
survey.toml, so the noise is exactly that of picks.csv and only the geometry differs. The
spherical times come from the package's exact Earth-flattening (invert.sphere; the transform
z_f = R ln(R / r), v_f = (R / r) v, Mueller, J. Geophys. 42, 1977; from memory), which
flat_earth_check.py compares with an independent ray calculation. Inverting picks_sphere.csv
with the flat model (run_sphere.toml) shows what the flat-Earth approximation does to the
answer at these distances. Run `invert synth survey.toml` first.

    python sphere_picks.py
"""

from __future__ import annotations

import sys
import tomllib
from pathlib import Path

import numpy as np

from invert.data import read_picks
from invert.forward import travel_times
from invert.model import LayerModel
from invert.sphere import travel_times_flattened

HERE = Path(__file__).resolve().parent
EARTH_RADIUS = 6371.0  # km, mean radius (common practice)


def make(folder: Path = HERE) -> Path:
    folder = Path(folder)
    spec = tomllib.loads((folder / "survey.toml").read_text())
    m = spec["model"]
    model = LayerModel.build(m["thickness"], m["vp"], vpvs=m["vpvs"])
    depth = {e["name"]: float(e["depth"]) for e in spec["survey"]["events"]}
    picks = read_picks(folder / "picks.csv", folder / "sources.csv", folder / "receivers.csv")
    shift = np.empty(picks.n_picks)
    for j in range(picks.n_picks):
        zs, x, wave = depth[picks.source_id[j]], [picks.distance[j]], picks.wave[j]
        flat = travel_times(model, wave, x, source_depth=zs, receiver_depth=picks.receiver_depth[j]).time[0, 0]
        sphere = travel_times_flattened(model, wave, x, source_depth=zs, receiver_depth=picks.receiver_depth[j],
                                        radius=EARTH_RADIUS).time[0, 0]
        shift[j] = sphere - flat
    path = folder / "picks_sphere.csv"
    lines = [f"# synthetic picks: picks.csv moved to a round Earth of radius {EARTH_RADIUS:g} km (sphere_picks.py); "
             "true model in survey.toml", "source,receiver,wave,time,sigma"]
    for j in range(picks.n_picks):
        lines.append(f"{picks.source_id[j]},{picks.receiver_id[j]},{picks.wave[j]},"
                     f"{float(picks.time[j] + shift[j])!r},{float(picks.sigma[j])!r}")
    path.write_text("\n".join(lines) + "\n")
    read_picks(path, folder / "sources.csv", folder / "receivers.csv")  # check what was written
    print(f"{picks.n_picks} picks written to {path}; sphere - flat: {shift.min():.3f} to {shift.max():.3f} s")
    return path


if __name__ == "__main__":
    make(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE)
