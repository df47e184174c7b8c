"""``bayesgeo demo-data``: write the invented demo data set."""

from __future__ import annotations

HELP = "write the demo data set (invented scenario, simulated from known parameters)"


def add_arguments(p) -> None:
    from bayesgeo.common.validate import int_option

    p.add_argument("--out", required=True, metavar="FILE", help="CSV to write; true parameters go beside it as <stem>.truth.json")
    p.add_argument("--seed", type=int_option("seed"), default=None, help="seed (default: the demo's own)")
    p.add_argument("--overwrite", action="store_true", help="replace existing files")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def run(args) -> int:
    from pathlib import Path

    from bayesgeo.cli._common import emit_json
    from bayesgeo.data.demo import DEMO_SEED, write_demo_data

    seed = DEMO_SEED if args.seed is None else args.seed
    truth = write_demo_data(args.out, seed=seed, overwrite=args.overwrite)
    out = Path(args.out)
    result = {"data": str(out), "truth": str(out.with_name(out.stem + ".truth.json")), "seed": seed,
              "sites": {k: v["n"] for k, v in truth["sites"].items()}}
    if args.json:
        emit_json(result)
    else:
        print(f"wrote {result['data']} ({sum(result['sites'].values())} samples at {len(result['sites'])} invented parcels)")
        print(f"true parameters: {result['truth']}")
    return 0
