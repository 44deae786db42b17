"""Write the P picks and the S picks of picks.csv to picks_p.csv and picks_s.csv.

The single-wave runs (run_p.toml, run_s.toml) then see exactly the same noisy times as the
joint run (run.toml). The picks are synthetic: run `invert synth survey.toml` first.

    python split_by_wave.py            # in this folder
"""

from __future__ import annotations

import sys
from pathlib import Path

from invert.data import read_picks, write_picks

HERE = Path(__file__).resolve().parent


def split(folder: Path = HERE) -> list[Path]:
    """Split ``folder/picks.csv`` by wave; returns the paths written."""
    folder = Path(folder)
    picks = read_picks(folder / "picks.csv")
    written = []
    for wave in ("P", "S"):
        sub = picks.subset(picks.wave == wave)
        path = folder / f"picks_{wave.lower()}.csv"
        write_picks(path, sub, comment=f"synthetic picks: the {wave} picks of picks.csv (true model in survey.toml)")
        print(f"{sub.n_picks} {wave} picks written to {path}")
        written.append(path)
    return written


if __name__ == "__main__":
    split(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE)
