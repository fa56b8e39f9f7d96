"""Time to write the report of a 2,000-species fit, figure by figure.

The fit folder is synthetic (posterior draws written directly, no sampling; see
tests/test_report_browser.py::make_synthetic_fit), so only the report is timed.

    /work/venv/bin/python benchmarks/bench_report.py [n_species]
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

from test_report_browser import make_synthetic_fit  # noqa: E402

from cladewise.report import build_fit_report  # noqa: E402

BUDGET_SECONDS = 60.0  # whole report, 2,000 species, on a 2-core machine


def main(n_species: int = 2000) -> int:
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        folder = make_synthetic_fit(Path(tmp) / "fit", n_species=n_species, seed=1, chains=4, draws=500)
        t_make = time.perf_counter() - t0
        res = build_fit_report(folder)
        size = res.path.stat().st_size
    print(f"report for {n_species} species (synthetic posterior, 4 chains x 500 draws; "
          f"folder written in {t_make:.1f} s)")
    print(f"{'part':<22}{'seconds':>10}")
    for name, sec in res.timings.items():
        flag = "  (skipped: " + res.skipped[name] + ")" if name in res.skipped else ""
        print(f"{name:<22}{sec:>10.2f}{flag}")
    print(f"report.html size: {size / 1e6:.2f} MB")
    total = res.timings["total"]
    ok = total < BUDGET_SECONDS
    print(f"total {total:.1f} s {'within' if ok else 'OVER'} the budget of {BUDGET_SECONDS:.0f} s")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 2000))
