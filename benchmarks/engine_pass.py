"""Benchmark of the one pass over the draws (not a test; prints figures and ratios).

Run from the repository root:

    .venv/bin/python benchmarks/engine_pass.py [PROJECT]     # default projects/tutoring-clubs

Measured in the same run, median of three repeats each:

1. ``analyse_project`` of the project (the whole analysis step);
2. the draws alone: every chunk of the study's assignments generated once
   (the floor of any randomization procedure);
3. one pass with every statistic (tests, balance, attrition) against three
   passes, one per consumer, over the same draws.

Prints the times and the ratios analysis / draws and three passes / one pass.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.checks.attrition import study_attrition_check  # noqa: E402
from report_kit.checks.balance import study_balance_check  # noqa: E402
from report_kit.inference.engine import MechanismDraws, run_pass  # noqa: E402
from report_kit.inference.randomization import study_assignments, study_randomization  # noqa: E402
from report_kit.pipeline import analyse_project, load_project  # noqa: E402


def timed(fn, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    project = Path(sys.argv[1]) if len(sys.argv) > 1 else ROOT / "projects" / "tutoring-clubs"
    study = load_project(project)
    mechanism, source = study_assignments(study)
    draws = MechanismDraws(source)
    balance, attrition = study_balance_check(study), study_attrition_check(study)
    checks = [attrition.statistic] + ([balance.statistic] if balance.statistic else [])

    t_analysis = timed(lambda: analyse_project(project))
    t_draws = timed(lambda: [draws.chunk(i) for i in range(draws.n_chunks)])
    t_one = timed(lambda: study_randomization(study, (mechanism, source), extra=checks))
    t_three = timed(lambda: (study_randomization(study, (mechanism, source)),
                             *(run_pass(draws, [c]) for c in checks)))
    print(f"project: {project.name}; {source.method} draws: {source.draws} x {mechanism.n} units "
          f"in {draws.n_chunks} chunks")
    print(f"analyse_project        {t_analysis:8.2f} s")
    print(f"draws alone            {t_draws:8.2f} s   analysis / draws = {t_analysis / t_draws:.1f}")
    print(f"one pass, all checks   {t_one:8.2f} s")
    print(f"one pass per consumer  {t_three:8.2f} s   ratio = {t_three / t_one:.2f}")


if __name__ == "__main__":
    main()
