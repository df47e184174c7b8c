"""Chains that run until they are long enough: looks at the convergence check while sampling.

A fit that fails the convergence check only because its chains are too short (R-hat at or above
1.01, or bulk or tail ESS below 400, Vehtari et al. 2021) usually passes when the *same* chains run
longer: measured on the data sets of ``bench/bench_convergence.py`` that failed with 1,000 draws
(bench/RESULTS.md, "Longer chains"), every one passed or warned at 2,000-3,000 draws, the chains'
medians agreeing from the start. So :func:`bayesgeo.fitting.sampling.sample`, given ``max_draws`` and a
``look`` (here :func:`convergence_look`), starts nutpie for ``max_draws`` draws per chain and looks
at the first ``k`` draws of every chain at ``k = draws, 2 draws, 4 draws, ..., max_draws``; it stops
at the first look that asks for no more (the check has no R-hat or ESS problem left) and keeps
exactly those ``k`` draws.

Reproducible: nutpie's chains draw from their own random streams, so the first ``k`` draws of a run
for ``max_draws`` equal those of a run for ``k`` (tested), and the decision at each look depends
only on those draws, never on timing. The looks are a stopping rule: a check that is looked at
several times passes a little more easily than one looked at once (the reason the looks are few,
at doubling lengths; every look is recorded in the fit). Divergences are not cured by longer chains
and never ask for another look.

Divergences are cured by smaller steps: when the user left the target acceptance at its default
(:data:`DEFAULT_ACCEPT`) and the kept draws hold divergent transitions, the fit is run once more with
fresh tuning at :data:`RERUN_ACCEPT` (:func:`rerun_if_divergent`; the first run is recorded). Measured
in bench/bench_convergence.py (bench/RESULTS.md, "Divergences"): at 0.9 nine of the ten fits with
divergences among the 40 benchmark data sets had none and the tenth 2 (31 at 0.8), while at n = 500
a target acceptance of 0.9 for every fit would cost 20-40% of the ESS per second, hence a rerun only
where divergences show.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import xarray as xr

__all__ = ["DEFAULT_ACCEPT", "EXTEND_CHECKS", "RERUN_ACCEPT", "convergence_look", "default_max_draws",
           "longest_chain", "looks_line", "report_fields", "rerun_if_divergent", "sample_fit"]

#: Problems of the check that longer chains cure (any level): R-hat and the two ESS.
EXTEND_CHECKS = ("rhat", "ess_bulk", "ess_tail")
#: Target acceptance of a single-site fit when the user gives none.
DEFAULT_ACCEPT = 0.8
#: Target acceptance of the rerun of a default fit whose draws hold divergent transitions.
RERUN_ACCEPT = 0.9


def default_max_draws(draws: int) -> int:
    """The default longest chain: four times the first look (4,000 draws for the default 1,000)."""
    return 4 * int(draws)


def longest_chain(draws: int, max_draws: int | None, *, where: str = "--max-draws", draws_name: str = "--draws") -> int:
    """The longest chain of a fit: ``max_draws``, or :func:`default_max_draws` when it is None.

    Raises
    ------
    InputError
        ``max_draws`` below ``draws`` (one line naming ``where`` and ``draws_name``).
    """
    from bayesgeo.common.validate import InputError

    if max_draws is None:
        return default_max_draws(draws)
    if max_draws < draws:
        raise InputError(f"{where}: expected at least {draws_name} ({draws}), got {max_draws}")
    return int(max_draws)


def convergence_look(prepare: Callable[[xr.DataTree], xr.DataTree], *, thresholds=None, var_names=None,
                     levels: tuple[str, ...] = ("fail", "warn")) -> Callable[[xr.DataTree], dict]:
    """A ``look`` for :func:`bayesgeo.fitting.sampling.sample`: the convergence check of the draws so far.

    Parameters
    ----------
    prepare : callable
        Raw sampler output (``posterior`` and ``sample_stats``) -> the tree the check reads (with
        the derived parameters in data units, as the saved fit will have them).
    thresholds, var_names
        Passed to :func:`bayesgeo.convergence.diagnostics.check_convergence` (default: its defaults).
    levels : tuple of str
        Problem levels that ask for more draws: R-hat and ESS problems that fail or only warn
        (default; ESS >= 400 is the reference's recommendation, Vehtari et al. 2021), or ``("fail",)``.

    Returns
    -------
    callable
        ``look(raw) -> {"verdict", "max_rhat", "min_ess_bulk", "min_ess_tail", "divergences",
        "short", "extend"}``; ``short`` lists the R-hat and ESS problems (parameter labels) that
        longer chains cure, and ``extend`` is true while there are any.
    """
    from bayesgeo.convergence.diagnostics import check_convergence

    def look(raw: xr.DataTree) -> dict:
        conv = check_convergence(prepare(raw), thresholds=thresholds, var_names=var_names)
        table = conv.parameters
        short = [p["item"] for p in conv.problems if p["check"] in EXTEND_CHECKS and p["level"] in levels]

        def pick(col, fn):
            v = np.asarray(table[col].values, dtype=float) if table.sizes.get("parameter") else np.array([])
            v = v[np.isfinite(v)]
            return float(fn(v)) if v.size else None

        return {"verdict": conv.verdict, "max_rhat": pick("rhat", np.max),
                "min_ess_bulk": pick("ess_bulk", np.min), "min_ess_tail": pick("ess_tail", np.min),
                "divergences": int(conv.divergences), "short": short, "extend": bool(short)}

    return look


def rerun_if_divergent(raw: xr.DataTree, run: Callable[[float], xr.DataTree], *,
                       accept: float = RERUN_ACCEPT) -> xr.DataTree:
    """``raw``, or ``run(accept)`` when ``raw``'s kept draws hold divergent transitions and its target
    acceptance is below ``accept``.

    ``run(target_accept)`` samples the same model afresh (same seed and settings, new tuning). The
    rerun is returned whatever its own divergences, with the first run in its ``rerun`` attribute
    (target acceptance, divergences, draws per chain, seconds), so the decision depends on the draws
    only and the result stays reproducible.
    """
    div = int(np.asarray(raw["sample_stats"]["diverging"].values, dtype=bool).sum())
    if div == 0 or float(raw.attrs["target_accept"]) >= accept:
        return raw
    first = {"target_accept": float(raw.attrs["target_accept"]), "divergences": div,
             "draws": int(raw["posterior"].sizes["draw"]), "seconds": float(raw.attrs["seconds"])}
    again = run(float(accept))
    again.attrs["rerun"] = first
    again.attrs["seconds"] = float(again.attrs["seconds"]) + first["seconds"]
    return again


def sample_fit(model, *, target_accept: float | None, default_accept: float, rerun_accept: float,
               seed: int | None, draws: int, max_draws: int | None, look, **sample_kw) -> xr.DataTree:
    """Sample a fit's model as :func:`bayesgeo.fitting.posterior.fit` and :func:`bayesgeo.fitting.hierarchical.fit_sites` do.

    The model is compiled once (nutpie); it is sampled with the ``look`` (chains continued up to
    :func:`longest_chain` draws) at ``target_accept``, or at ``default_accept`` when that is None, and
    then, only in that case, :func:`rerun_if_divergent` at ``rerun_accept``. A missing seed is drawn
    once, so both runs use the same. ``sample_kw`` goes to :func:`bayesgeo.fitting.sampling.sample`. The
    result's ``seconds`` include the compilation (and a first run).
    """
    import time

    from bayesgeo.fitting.sampling import compile_model, new_seed, sample

    seed = new_seed() if seed is None else seed
    t0 = time.perf_counter()
    compiled = compile_model(model) if sample_kw.get("sampler", "nutpie") == "nutpie" else model
    compile_seconds = time.perf_counter() - t0

    def run(accept: float) -> xr.DataTree:
        return sample(compiled, target_accept=accept, seed=seed, draws=draws,
                      max_draws=longest_chain(draws, max_draws), look=look, **sample_kw)

    raw = run(default_accept if target_accept is None else target_accept)
    if target_accept is None:
        raw = rerun_if_divergent(raw, run, accept=rerun_accept)
    raw.attrs["seconds"] = float(raw.attrs["seconds"]) + compile_seconds
    return raw


def report_fields(sampler: dict) -> dict:
    """``max_draws``, ``looks`` and ``rerun`` of a fit's sampler settings, for its JSON report (only
    those present: the chains could be continued, the fit was rerun)."""
    keys = (("max_draws", "looks") if "looks" in sampler else ()) + (("rerun",) if "rerun" in sampler else ())
    return {k: sampler[k] for k in keys}


def looks_line(sampler: dict) -> str | None:
    """One line for summary.txt when the chains were continued or the fit rerun for its divergences
    (None when neither happened)."""
    parts = []
    first = sampler.get("rerun")
    if first:
        parts.append(f"{first['divergences']} divergent transitions at target acceptance {first['target_accept']:g}: "
                     f"sampled again at {sampler['target_accept']:g}")
    looks = sampler.get("looks") or []
    if len(looks) >= 2:
        seen = ", ".join(f"{lk['verdict']} at {lk['draws']}" for lk in looks)
        parts.append(f"chains continued while R-hat or ESS was too poor (up to {sampler['max_draws']} draws): {seen}")
    return "; ".join(parts) or None
