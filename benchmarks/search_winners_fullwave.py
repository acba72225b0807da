"""Full-wave check of the winners of benchmarks/search_models.py (issue 12 item 4).

    python benchmarks/search_winners_fullwave.py DIR [--quality fast|normal]

DIR holds the winners' tables written by search_models.py (``<study>_<scheme>.csv``). For the
WKB-scored and the exact-scored winner of each study: the goal's wanted fraction, band mean and
the number of frequencies meeting ``required_fraction``, from the exact row model (line variant,
the full-wave's idealisation) and from the full-wave check itself (optgrade.fullwave.verify).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
STUDY_DIRS = (HERE.parent / "studies", HERE / "studies")


def _study_file(name: str) -> Path:
    for d in STUDY_DIRS:
        if (d / f"{name}.toml").exists():
            return d / f"{name}.toml"
    raise FileNotFoundError(name)


def main(argv: list[str] | None = None) -> int:
    from optgrade.fullwave import verify
    from optgrade.layout import read_table
    from optgrade.propagation import propagation_model
    from optgrade.study import load_study
    from optgrade.verdict import verdict, verdict_of_fractions

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("dir", type=Path)
    p.add_argument("--quality", default="fast", choices=["fast", "normal"])
    args = p.parse_args(argv)
    print("| study | scorer | exact (line): mean wanted, met | full-wave: mean wanted, met "
          "| full-wave status |")
    print("| --- | --- | --- | --- | --- |")
    for table in sorted(args.dir.glob("*_wkb.csv")) + sorted(args.dir.glob("*_exact.csv")):
        name, scheme = table.stem.rsplit("_", 1)
        study = load_study(_study_file(name))
        layout = read_table(table)
        ver = verify(study, layout, quality=args.quality, progress=False, n_snapshots=0)
        ex = propagation_model(study, "scattering", model="line").trace(layout, ver.frequency)
        v_ex = verdict(study, layout, ex)
        cells = [f"{v_ex.wanted.mean():.3f}, {int(v_ex.meets.sum())}/{v_ex.meets.size}"]
        if ver.status == "ok":
            v_fw = verdict_of_fractions(study, layout, ver.frequency, ver.fractions,
                                        "full-wave")
            cells.append(f"{v_fw.wanted.mean():.3f}, {int(v_fw.meets.sum())}/{v_fw.meets.size}")
        else:
            cells.append("-")
        print(f"| {name} | {scheme} | {cells[0]} | {cells[1]} | {ver.status} |", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
