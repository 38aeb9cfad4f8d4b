"""Writes the demo scenario's sample exports (invented plant, fixed seeds): `python -m monitor.scenario DIR`.

Brackenfield Foods (an invented plant), Hall 1–3, on the night shift of 2026-11-30:

- Line L1, OAT-500 (500 g bags of oat flakes), a 6-head weigher, canonical CSV every 15 minutes.
  OAT-24A101 on target; OAT-24A102 drifted low (spans two files); OAT-24A103 with head H4 under-filling a
  third of its packs (not normal); OAT-24A104 a lot of 8 packs (too small to judge).
- Line L2, JAM-340 (340 g jars), a checkweigher whose export has a preamble, semicolons and decimal commas
  in Latin-1. J-5521 on target (two failed weighings "ERR"); J-5522 drifted high (giveaway); J-5523 a
  short noisy lot (no shift shown, but too few jars to rule one out). A later export is damaged.
- Line L3, JUICE-1L (1 L cartons) weighed gross in grams (carton tare 28 g, juice density 1.045 g/mL):
  JC-0901 on target, JC-0902 under-filled. SYRUP-750 (750 mL bottles) comes from a flow meter that only
  exports per-lot summaries: SY-301 on target, SY-302 low.
"""

from __future__ import annotations

import sys
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np

START = datetime(2026, 11, 30, 6, 0, 0)


def _stamp(i: int, base: datetime, every_s: float) -> str:
    return (base + timedelta(seconds=i * every_s)).strftime("%Y-%m-%dT%H:%M:%S")


def _oat_rows(rng: np.random.Generator, lot: str, n: int, mean: float, sd: float, start: datetime,
              bad_head: str | None = None) -> list[str]:
    rows = []
    for i in range(n):
        head = f"H{i % 6 + 1}"
        v = rng.normal(mean, sd)
        if bad_head and head == bad_head and rng.random() < 0.6:
            v -= rng.uniform(7.0, 10.0)          # a sticking bucket: short packs from one head
        rows.append(f"{_stamp(i, start, 2.5)},L1,OAT-500,{lot},{head},{v:.1f},g")
    return rows


def write_feeds(folder: Path) -> list[Path]:
    """Write every sample export into ``folder``; returns the paths written."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261130)
    written: list[Path] = []
    header = "timestamp,line,product,lot,head,value,unit"

    # Line L1 — canonical CSV. Rule: target 503.0 g, two-sided, alpha 0.01, min_n 20.
    a101 = _oat_rows(rng, "OAT-24A101", 60, 503.1, 1.6, START)
    a102 = _oat_rows(rng, "OAT-24A102", 60, 501.2, 1.6, START + timedelta(minutes=3))
    f1 = folder / "L1-oat-20261130-0600.csv"
    f1.write_text("\n".join([header, *a101, *a102[:30]]) + "\n", encoding="utf-8")
    a103 = _oat_rows(rng, "OAT-24A103", 60, 503.0, 1.6, START + timedelta(minutes=6), bad_head="H4")
    a104 = _oat_rows(rng, "OAT-24A104", 8, 503.4, 1.6, START + timedelta(minutes=9))
    f2 = folder / "L1-oat-20261130-0615.csv"
    f2.write_text("\n".join([header, *a102[30:], *a103, *a104]) + "\n", encoding="utf-8")
    written += [f1, f2]

    # Line L2 — weigher layout: preamble, ';' and decimal comma, Latin-1. Rule: target 342.0 g.
    def jam_file(name: str, lots: list[tuple[str, int, float, float]], start: datetime,
                 errors: int = 0) -> Path:
        lines = ["Brackenfield Foods – Halle 2 – Kontrollwaage CW-2".replace("–", "-"),
                 "Export;2026-11-30;Schicht Nacht",
                 "Artikel;JAM-340;Confiture abricot 340 g (pâte de fruits)",
                 "",
                 "Batch;Article;Line;Time;Valve;Net wt [g]"]
        k = 0
        for lot, n, mean, sd in lots:
            for i in range(n):
                v = rng.normal(mean, sd)
                raw = f"{v:.2f}".replace(".", ",")
                if errors and i in (7, 19):
                    raw = "ERR"
                lines.append(f"{lot};JAM-340;L2;{_stamp(k, start, 4.0)};V{i % 4 + 1};{raw}")
                k += 1
        path = folder / name
        path.write_bytes(("\r\n".join(lines) + "\r\n").encode("latin-1"))
        return path

    written.append(jam_file("L2-jam-20261130-0600.txt",
                            [("J-5521", 40, 342.1, 0.9), ("J-5522", 40, 343.4, 0.9)], START, errors=2))
    written.append(jam_file("L2-jam-20261130-0630.txt", [("J-5523", 12, 342.9, 2.6)],
                            START + timedelta(minutes=30)))
    broken = folder / "L2-jam-20261130-0700.txt"
    broken.write_bytes(("Brackenfield Foods - Halle 2 - Kontrollwaage CW-2\r\n"
                        "Export;2026-11-30;Schicht Nacht\r\n"
                        "Batch;Article;Line;Time;Valve;Net wt [g]\r\n"
                        + "".join(f"J-5524;JAM-340;L2;2026-11-30T07:00:{i:02d};V1;#####\r\n" for i in range(20))
                        ).encode("latin-1"))
    written.append(broken)

    # Line L3 — juice cartons weighed gross (g): tare 28 g, density 1.045 g/mL. Rule: target 1003 mL,
    # alternative "less" (short fill is the legal risk), known process sd 2.5 mL -> z-test.
    rows: list[str] = []
    for lot, n, mean_ml in (("JC-0901", 30, 1003.4), ("JC-0902", 30, 1001.2)):
        for _ in range(n):
            net_g = rng.normal(mean_ml, 2.5) * 1.045
            rows.append(f"{_stamp(len(rows), START, 6.0)},L3,JUICE-1L,{lot},,{net_g + 28.0:.1f},g")
    f3 = folder / "L3-juice-20261130-0600.csv"
    f3.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    written.append(f3)

    # Line L3 — flow meter summaries for SYRUP-750 (mL). Rule: target 752 mL, two-sided.
    f4 = folder / "L3-syrup-summary-20261130.csv"
    f4.write_text("lot,product,line,n,mean,sd,unit\n"
                  "SY-301,SYRUP-750,L3,120,752.08,1.91,mL\n"
                  "SY-302,SYRUP-750,L3,120,751.21,1.87,mL\n", encoding="utf-8")
    written.append(f4)
    return written


if __name__ == "__main__":  # pragma: no cover
    out = Path(sys.argv[1] if len(sys.argv) > 1 else "sample_feeds")
    for p in write_feeds(out):
        print(p)
