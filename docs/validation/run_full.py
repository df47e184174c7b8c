"""Run the full-mode validation in chunks that are saved as they finish (the script behind the
"Full mode" section of docs/validation.md).

``bayesgeo validate`` writes its report only when every replicate is done; on a shared machine a
run of several hours is easier to follow, and to cut short honestly, when it is split into
chunks of replicates with their own seeds. Replicates of different chunks are independent draws
of the same SBC experiment, so their ranks and coverage indicators pool into one result
(``xarray.concat`` along ``replicate``), summarised by :func:`bayesgeo.calibration.ranks.sbc_summary`.

Usage (one process per model configuration; each compiles its model once)::

    python docs/validation/run_full.py run --kind single --nugget 1 --out DIR
    python docs/validation/run_full.py merge --out DIR      # tables, figures, JSON

Chunk c of a configuration uses seed ``seed + c``; the layout is generated once with
``--layout-seed``. Each chunk is saved as ``DIR/<kind>-<family>-<nugget>-<c>.nc`` with its wall
time and the load average at the end in its attributes.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.calibration.config import FULL, generated_layout, with_settings
from bayesgeo.calibration.validation import simulation_based_calibration
from bayesgeo.calibration.ranks import sbc_summary


def _run(a) -> None:
    cfg = with_settings(FULL, kind=a.kind, covariance=a.covariance, nugget=bool(a.nugget),
                        nu=a.nu if a.covariance == "matern" else None, max_draws=a.max_draws,
                        coordinates=a.coordinates, trend=a.trend)
    if a.kind == "hierarchical":
        tpl = generated_layout(max(12, a.points // 2), sites=3, seed=a.layout_seed)
    else:
        tpl = generated_layout(a.points, seed=a.layout_seed)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    family = f"matern{a.nu:g}".replace(".", "p") if a.covariance == "matern" else a.covariance
    stem = f"{a.kind}-{family}-{'nugget' if a.nugget else 'no-nugget'}"
    prefix = {("legacy", "sampled"): "", ("share", "sampled"): "share-", ("share", "auto"): "default-",
              ("legacy", "auto"): "legacy-int-"}[(a.coordinates, a.trend)]
    stem = f"{prefix}{stem}"
    for c in range(a.chunks):
        path = out / f"{stem}-{c}.nc"
        if path.exists():
            continue
        t0 = time.perf_counter()
        res = simulation_based_calibration(tpl, cfg, replicates=a.chunk_size, seed=a.seed + c)
        res.attrs.update({"wall_seconds": time.perf_counter() - t0, "loadavg_end": os.getloadavg()[0],
                          "chunk": c, "finished": time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime()),
                          "layout_seed": a.layout_seed})
        res.to_netcdf(str(path) + ".tmp", engine="netcdf4")
        os.replace(str(path) + ".tmp", path)
        print(f"{stem} chunk {c}: {a.chunk_size} replicates in {res.attrs['wall_seconds']:.0f} s, "
              f"{int((res['verdict'].values == 'fail').sum())} unconverged", flush=True)


def _merge(a) -> None:
    from bayesgeo.calibration.report import coverage_figure, rank_figure

    out = Path(a.out)
    groups: dict[str, list[Path]] = {}
    for p in sorted(out.glob("*.nc")):
        groups.setdefault(p.stem.rsplit("-", 1)[0], []).append(p)
    report = {}
    for stem, paths in groups.items():
        parts = [xr.load_dataset(p) for p in sorted(paths, key=lambda p: int(p.stem.rsplit("-", 1)[1]))]
        res = xr.concat(parts, dim="replicate", combine_attrs="drop_conflicts")
        res = res.assign_coords(replicate=np.arange(res.sizes["replicate"]))
        res.attrs["ranks_of"] = int(parts[0].attrs["ranks_of"])
        res.attrs["model"] = parts[0].attrs["model"]
        s = sbc_summary(res)
        rf, cf = rank_figure(res, s), coverage_figure(s)
        rf.savefig(out / f"full-{stem}-ranks.png", dpi=90, bbox_inches="tight")
        cf.savefig(out / f"full-{stem}-coverage.png", dpi=90, bbox_inches="tight")
        report[stem] = {"summary": s, "chunks": [{"chunk": int(p.attrs["chunk"]), "seed": int(p.attrs["seed"]),
                                                  "replicates": int(p.sizes["replicate"]),
                                                  "wall_seconds": float(p.attrs["wall_seconds"]),
                                                  "loadavg_end": float(p.attrs["loadavg_end"]),
                                                  "finished": p.attrs["finished"]} for p in parts],
                        "config": json.loads(parts[0].attrs["config"]),
                        "ranks": res["rank"].values.tolist(), "truth": res["truth"].values.tolist(),
                        "quantity_order": [str(q) for q in res["quantity"].values],
                        "verdicts": [str(v) for v in res["verdict"].values]}
    from bayesgeo.common.io import to_jsonable

    (out / "full.json").write_text(json.dumps(to_jsonable(report), indent=1), encoding="utf-8")
    for stem, r in report.items():
        s = r["summary"]
        secs = sum(c["wall_seconds"] for c in r["chunks"])
        print(f"#### {s['model']}: {'pass' if s['ok'] else 'FAIL'}\n\n{s['replicates']} replicates in "
              f"{len(r['chunks'])} chunks, {secs:.0f} s wall; unconverged: {len(s['failed_fits'])}\n")
        print("| quantity | rank test p | 50% covered [bounds] | 90% covered [bounds] | 90% among converged |")
        print("| --- | --- | --- | --- | --- |")
        for q, e in s["quantities"].items():
            c5, c9, cc = e["coverage"]["0.5"], e["coverage"]["0.9"], e["coverage_converged"].get("0.9")
            p = e["uniformity"]["pvalue"]
            print(f"| {q} | {'-' if p is None else f'{p:.3g}'} | {c5['count']}/{c5['of']} {c5['bounds']} | "
                  f"{c9['count']}/{c9['of']} {c9['bounds']} | "
                  f"{'-' if cc is None else str(cc['count']) + '/' + str(cc['of'])} |")
        print()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    r = sub.add_parser("run")
    r.add_argument("--kind", default="single")
    r.add_argument("--covariance", default="matern32")
    r.add_argument("--nu", type=float, default=1.0, help="smoothness of --covariance matern (general Matérn)")
    r.add_argument("--nugget", type=int, default=1)
    r.add_argument("--points", type=int, default=60)
    r.add_argument("--layout-seed", type=int, default=7)
    r.add_argument("--seed", type=int, default=100)
    r.add_argument("--chunks", type=int, default=4)
    r.add_argument("--chunk-size", type=int, default=25)
    r.add_argument("--coordinates", choices=("legacy", "share"), default="share",
                   help="sampling coordinates of the single-site model (share, the default: log total variance, "
                        "logit spatial share; legacy: log sds)")
    r.add_argument("--trend", choices=("auto", "sampled"), default="auto",
                   help="auto (default): the dense likelihood integrates the trend out and draws it afterwards; "
                        "sampled: the earlier model")
    r.add_argument("--max-draws", type=int, default=None,
                   help="continue a replicate's chains while R-hat or ESS fails, up to this many draws (default 4 x 500)")
    r.add_argument("--out", required=True)
    m = sub.add_parser("merge")
    m.add_argument("--out", required=True)
    a = ap.parse_args()
    _run(a) if a.cmd == "run" else _merge(a)


if __name__ == "__main__":
    main()
