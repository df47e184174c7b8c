"""Chains that run until they are long enough: looks at the convergence check while sampling.

A fit that fails the convergence check only because its chains are too short (R-hat at or above
1.01, or bulk or tail ESS below 400, Vehtari et al. 2021) usually passes when the *same* chains run
longer: measured on the data sets of ``bench/bench_convergence.py`` that failed with 1,000 draws
(bench/RESULTS.md, "Longer chains"), every one passed or warned at 2,000-3,000 draws, the chains'
medians agreeing from the start. So :func:`sample_with_looks` starts nutpie for ``max_draws`` draws
per chain and looks at the first ``k`` draws of every chain at ``k = draws, 2 draws, 4 draws, ...,
max_draws``; it stops at the first look that asks for no more (the check has no R-hat or ESS
problem left) and keeps exactly those ``k`` draws.

Reproducible: nutpie's chains draw from their own random streams, so the first ``k`` draws of a run
for ``max_draws`` equal those of a run for ``k`` (tested), and the decision at each look depends
only on those draws, never on timing. The looks are a stopping rule: a check that is looked at
several times passes a little more easily than one looked at once (the reason the looks are few,
at doubling lengths; every look is recorded in the fit). Divergences are not cured by longer chains
and never ask for another look.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import xarray as xr

__all__ = ["EXTEND_CHECKS", "chain_lengths", "convergence_look", "default_max_draws", "first_draws",
           "sample_with_looks"]

#: Problems of the check that longer chains cure (any level): R-hat and the two ESS.
EXTEND_CHECKS = ("rhat", "ess_bulk", "ess_tail")


def default_max_draws(draws: int) -> int:
    """The default longest chain: four times the first look (4,000 draws for the default 1,000)."""
    return 4 * int(draws)


def chain_lengths(draws: int, max_draws: int) -> list[int]:
    """Draws per chain at each look: ``draws``, doubling while below ``max_draws``, then ``max_draws``.

    >>> chain_lengths(1000, 4000)
    [1000, 2000, 4000]
    >>> chain_lengths(1000, 3000)
    [1000, 2000, 3000]
    """
    out, k = [], int(draws)
    while k < max_draws:
        out.append(k)
        k *= 2
    out.append(int(max_draws))
    return out


def first_draws(tree: xr.DataTree, k: int) -> xr.DataTree:
    """The first ``k`` draws of every chain in every group of ``tree`` that has a ``draw`` dim."""
    groups = {}
    for name, node in tree.children.items():
        ds = node.to_dataset()
        groups[f"/{name}"] = ds.isel(draw=slice(0, k)) if "draw" in ds.dims else ds
    out = xr.DataTree.from_dict(groups)
    out.attrs = dict(tree.attrs)
    return out


def convergence_look(prepare: Callable[[xr.DataTree], xr.DataTree], *, thresholds=None, var_names=None,
                     levels: tuple[str, ...] = ("fail", "warn")) -> Callable[[xr.DataTree], dict]:
    """A ``look`` for :func:`bayesgeo.sampling.sample`: the convergence check of the draws so far.

    Parameters
    ----------
    prepare : callable
        Raw sampler output (``posterior`` and ``sample_stats``) -> the tree the check reads (with
        the derived parameters in data units, as the saved fit will have them).
    thresholds, var_names
        Passed to :func:`bayesgeo.diagnostics.check_convergence` (default: its defaults).
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
    from bayesgeo.diagnostics import check_convergence

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


class _Progress:
    """nutpie's progress callback: remembers each chain's finished iterations (tuning included)."""

    def __init__(self, bar):
        self.bar, self.done = bar, None

    def __call__(self, chains) -> None:
        self.done = [int(c.finished_draws) for c in chains]
        self.bar.update(chains)


def _complete(tree: xr.DataTree, k: int) -> bool:
    """Whether the first ``k`` draws of every chain are all present (nutpie pads unfinished chains)."""
    post = tree["posterior"].to_dataset()
    if post.sizes.get("draw", 0) < k:
        return False
    return all(bool(np.isfinite(np.asarray(post[v].isel(draw=slice(0, k)).values, dtype=float)).all())
               for v in post.data_vars)


def _stop(run) -> None:
    """Stop a nutpie run that may still be sampling (its ``is_finished`` raises while it runs)."""
    try:
        run.cancel()
    except Exception:  # noqa: BLE001 - already finished and its results taken: nothing to stop
        pass


def sample_with_looks(compiled, *, look, draws: int, max_draws: int, tune: int, chains: int, cores: int,
                      seed: int, bar, adaptation: str, target_accept: float,
                      poll_seconds: float = 0.05) -> tuple[xr.DataTree, list[dict]]:
    """Run nutpie for up to ``max_draws`` draws per chain, looking at :func:`chain_lengths`.

    Parameters
    ----------
    compiled
        A nutpie compiled model.
    look : callable
        ``look(tree) -> dict`` (e.g. :func:`convergence_look`); ``"extend"`` true asks for the next look.
    draws, max_draws, tune, chains, cores, seed, adaptation, target_accept
        As in :func:`bayesgeo.sampling.sample`; ``cores`` should equal ``chains`` so that every
        chain reaches a look at the same time.
    bar
        The progress bar of :func:`bayesgeo.sampling.sample` (its total follows the looks).
    poll_seconds : float
        How often the chains' progress is read while waiting for a look (s).

    Returns
    -------
    tree : xarray.DataTree
        ``posterior`` and ``sample_stats`` with the draws kept (the first ``k`` of every chain).
    looks : list of dict
        ``{"draws": k, **look(...)}`` per look, in order.
    """
    import nutpie

    progress = _Progress(bar)
    lengths = chain_lengths(draws, max_draws)
    run = nutpie.sample(compiled, draws=max_draws, tune=tune, chains=chains, cores=cores, seed=seed,
                        save_warmup=False, progress_bar=False, progress_callback=progress, blocking=False,
                        adaptation=adaptation, target_accept=target_accept)
    looks: list[dict] = []
    try:
        for k in lengths:
            if bar.bar is not None:
                bar.bar.total = chains * (tune + k)
            if k == max_draws:
                kept = run.wait()
            else:
                while True:
                    if progress.done is not None and len(progress.done) == chains and min(progress.done) >= tune + k:
                        kept = first_draws(run.inspect(), k)
                        if _complete(kept, k):
                            break
                    time.sleep(poll_seconds)
            record = look(kept)
            if "short" in record:
                record = {**record, "short": list(record["short"])[:10]}  # a few labels suffice
            looks.append({"draws": int(k), **record})
            if not record.get("extend") or k == max_draws:
                return kept, looks
    finally:
        _stop(run)
    raise AssertionError("unreachable: the last look returns")  # pragma: no cover
