"""``bayesgeo run STUDY.toml``: every stage of a study in order, a report and a manifest.

See :mod:`bayesgeo.study.runner` for the run folder and ``docs/study_file.md`` for the study file.
Exit status: 0 done; 2 bad input (the study, the data, an existing run folder); 3 a fit failed its
convergence check (the report is written, marked NOT CONVERGED); 1 a stage failed unexpectedly.
"""

from __future__ import annotations

HELP = "run a whole study (explore, fit, check, map, compare, report) from a TOML study file"


def add_arguments(p) -> None:
    p.add_argument("study", metavar="STUDY", help="study file (TOML; see docs/study_file.md)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="run folder (default: [output] dir of the study, else <study stem>-run beside it)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")


def stage_logger(enabled: bool):
    """A function printing one progress line per stage on stderr (None when disabled)."""
    import sys

    if not enabled:
        return None

    def log(msg: str) -> None:
        print(f"bayesgeo run: {msg}", file=sys.stderr, flush=True)

    return log


def print_result(res: dict, command: str = "run") -> None:
    """Human summary of a :func:`bayesgeo.study.runner.run_study` result."""
    head = {0: "done", 1: "INCOMPLETE", 3: "NOT CONVERGED"}.get(res["status"], str(res["status"]))
    print(f"bayesgeo {command}: {head}: {res['message']}")
    for stage, verdict in res["verdicts"].items():
        print(f"  {stage:<32} {verdict}")
    print(f"report:   {res['report']}")
    print(f"manifest: {res['manifest']}")
    print("caution: the results support, but do not replace, the judgement of a licensed professional; "
          "decisions must follow local regulation.")


def run(args) -> int:
    from bayesgeo.cli._common import emit_json
    from bayesgeo.study.runner import run_study
    from bayesgeo.study.settings import read_study

    import sys

    study = read_study(args.study)
    res = run_study(study, out=args.out, overwrite=True if args.overwrite else None,
                    argv=["bayesgeo", *sys.argv[1:]], log=stage_logger(not args.json))
    if args.json:
        emit_json(res)
    else:
        print_result(res)
    return res["status"]
