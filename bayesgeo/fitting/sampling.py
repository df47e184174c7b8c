"""Sampling a model with NUTS: nutpie (default) or PyMC's own sampler, on the CPU.

BLAS is limited to one thread per chain while sampling (threadpoolctl): dense GP likelihoods
factorise n x n matrices, and several BLAS threads per chain on a small machine oversubscribe the
cores (measured in ``bench/RESULTS.md``; ``docs/numerics.md``). With an integer ``seed`` the same model
and settings give identical draws.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import xarray as xr

from bayesgeo.common.validate import check_choice, check_float, check_int
from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE

__all__ = ["SAMPLERS", "ADAPTATIONS", "CompiledModel", "chain_lengths", "compile_model", "first_draws",
           "select_draws", "sample", "new_seed"]

#: NUTS implementations offered.
SAMPLERS = ("nutpie", "pymc")
#: nutpie mass-matrix adaptations offered (``low_rank`` adapts to the range/sill correlation).
ADAPTATIONS = ("low_rank", "diag")


@dataclass(frozen=True)
class CompiledModel:
    """A model with its nutpie log-density compiled once, for several samplings of the same model."""

    model: object
    compiled: object


def compile_model(model) -> CompiledModel:
    """Compile ``model`` (from :func:`bayesgeo.fitting.model.build_model`) for nutpie (Numba backend).

    Compilation takes seconds; pass the result to :func:`sample` to sample the same model
    several times (different seeds or settings) without compiling again.
    """
    import nutpie

    return CompiledModel(model=model, compiled=nutpie.compile_pymc_model(model, backend="numba"))


class _StderrProgress:
    """A tqdm bar on stderr fed by nutpie's progress callback (draws done over all chains)."""

    def __init__(self, total: int, *, enabled: bool):
        self.total, self.enabled, self.bar = total, enabled, None

    def __enter__(self):
        if self.enabled:
            import sys

            from tqdm.auto import tqdm

            self.bar = tqdm(total=self.total, desc="sampling", unit="draw", file=sys.stderr, leave=False)
        return self

    def update(self, chains) -> None:
        if self.bar is not None:
            done = sum(int(c.finished_draws) for c in chains)
            div = sum(int(c.divergences) for c in chains)
            self.bar.n = done
            self.bar.set_postfix(divergences=div, refresh=False)
            self.bar.refresh()

    def __exit__(self, *exc) -> None:
        if self.bar is not None:
            self.bar.close()


def new_seed() -> int:
    """A fresh seed from the operating system's entropy (recorded so a run can be repeated)."""
    return int(np.random.SeedSequence().entropy % (2**31 - 1))


def sample(model, *, sampler: str = "nutpie", chains: int = CHAINS, draws: int = DRAWS, tune: int = TUNE,
           target_accept: float = 0.8, seed: int | None = None, progressbar: bool = False,
           adaptation: str = "low_rank", cores: int | None = None, max_draws: int | None = None,
           look=None):
    """Draw from the posterior of ``model`` with NUTS.

    Parameters
    ----------
    model : pymc.Model or CompiledModel
        From :func:`bayesgeo.fitting.model.build_model`, or compiled once by :func:`compile_model`.
    sampler : {"nutpie", "pymc"}
        nutpie (Rust NUTS over a Numba-compiled log-density; chains in threads) or PyMC's NUTS.
    chains, draws, tune : int
        Chains, kept draws per chain and tuning (warm-up) iterations per chain.
    target_accept : float
        Target acceptance rate of the step-size adaptation, in (0, 1).
    seed : int, optional
        Seed of the sampler; a fresh one is drawn (and recorded in the result) when omitted.
    progressbar : bool
        Show a progress bar on stderr (nutpie: draws over all chains and divergences so far;
        PyMC: its own bar).
    adaptation : {"low_rank", "diag"}
        Mass-matrix adaptation of nutpie (ignored by ``"pymc"``, which adapts a diagonal one).
    cores : int, optional
        Chains run in parallel (default: up to the number of CPUs; every chain at once when the
        chains may be extended, so that they all reach a look together).
    max_draws : int, optional
        With ``look``: continue the same chains up to this many draws per chain while ``look``
        asks for more (nutpie only; :func:`chain_lengths` gives the looks:
        ``draws``, then doubling, then ``max_draws``). Without it, or with ``max_draws <= draws``,
        exactly ``draws`` are drawn.
    look : callable, optional
        ``look(tree) -> dict`` on the first ``k`` draws of every chain; a true ``"extend"`` in
        the dict asks for the next look. Every dict is kept in the ``looks`` attribute.

    Returns
    -------
    xarray.DataTree
        ``posterior`` and ``sample_stats`` groups; root attrs ``sampler``, ``seed``, ``chains``,
        ``draws`` (kept per chain), ``tune``, ``target_accept``, ``adaptation``, ``seconds``
        (wall time with compilation), ``sampling_seconds`` (the sampler's call alone; PyMC's
        sampler still compiles inside it) and, when chains could be extended, ``max_draws`` and
        ``looks`` (list of the ``look`` dicts, each with its ``draws``).
    """
    from threadpoolctl import threadpool_limits

    check_choice(sampler, SAMPLERS, "sampler")
    check_choice(adaptation, ADAPTATIONS, "adaptation")
    chains = check_int(chains, "--chains", limit="chains")
    draws = check_int(draws, "--draws", limit="draws")
    tune = check_int(tune, "--tune", limit="tune")
    target_accept = check_float(target_accept, "--target-accept", "probability")
    if seed is None:
        seed = new_seed()
    seed = check_int(seed, "--seed", limit="seed")
    if max_draws is not None:
        max_draws = check_int(max_draws, "--max-draws", limit="draws")
    extend = sampler == "nutpie" and look is not None and max_draws is not None and max_draws > draws
    looks = None
    t0 = time.perf_counter()
    with threadpool_limits(limits=1, user_api="blas"):
        if sampler == "nutpie":
            import nutpie

            compiled = model if isinstance(model, CompiledModel) else compile_model(model)
            t1 = time.perf_counter()
            with _StderrProgress(chains * (draws + max(tune, 1)), enabled=progressbar) as bar:
                if extend:
                    tree, looks = _sample_with_looks(
                        compiled.compiled, look=look, draws=draws, max_draws=max_draws, tune=max(tune, 1),
                        chains=chains, cores=chains if cores is None else cores, seed=seed, bar=bar,
                        adaptation=adaptation, target_accept=float(target_accept))
                else:
                    tree = nutpie.sample(
                        compiled.compiled, draws=draws, tune=max(tune, 1), chains=chains, cores=cores, seed=seed,
                        save_warmup=False, progress_bar=False,
                        progress_callback=bar.update if progressbar else None,
                        adaptation=adaptation, target_accept=float(target_accept),
                    )
        else:
            import pymc as pm

            if isinstance(model, CompiledModel):
                model = model.model
            t1 = time.perf_counter()
            tree = pm.sample(
                draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed, nuts_sampler="pymc",
                progressbar=progressbar, quiet=not progressbar, model=model,
                nuts={"target_accept": float(target_accept)}, compute_convergence_checks=False,
            )
    t2 = time.perf_counter()
    tree.attrs.update({
        "sampler": sampler, "seed": seed, "chains": chains, "draws": int(tree["posterior"].sizes["draw"]),
        "tune": tune, "target_accept": float(target_accept),
        "adaptation": adaptation if sampler == "nutpie" else "diag", "seconds": t2 - t0, "sampling_seconds": t2 - t1,
    })
    if extend:
        tree.attrs.update({"max_draws": max_draws, "looks": looks})
    return tree


# --- chains continued while a look asks for more (bayesgeo.fitting.looks) --------------------------------


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
    return select_draws(tree, slice(0, k))


def select_draws(tree: xr.DataTree, draws: slice) -> xr.DataTree:
    """The draws ``draws`` (a slice along ``draw``, e.g. every k-th) of every chain in every group of ``tree``
    that has a ``draw`` dim; other groups and the attributes as they are."""
    groups = {}
    for name, node in tree.children.items():
        ds = node.to_dataset()
        groups[f"/{name}"] = ds.isel(draw=draws) if "draw" in ds.dims else ds
    out = xr.DataTree.from_dict(groups)
    out.attrs = dict(tree.attrs)
    return out


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


def _sample_with_looks(compiled, *, look, draws: int, max_draws: int, tune: int, chains: int, cores: int,
                      seed: int, bar, adaptation: str, target_accept: float,
                      poll_seconds: float = 0.05) -> tuple[xr.DataTree, list[dict]]:
    """Run nutpie for up to ``max_draws`` draws per chain, looking at :func:`chain_lengths`.

    Parameters
    ----------
    compiled
        A nutpie compiled model.
    look : callable
        ``look(tree) -> dict`` (e.g. :func:`bayesgeo.fitting.looks.convergence_look`); ``"extend"`` true asks for the next look.
    draws, max_draws, tune, chains, cores, seed, adaptation, target_accept
        As in :func:`sample`; ``cores`` should equal ``chains`` so that every
        chain reaches a look at the same time.
    bar
        The progress bar of :func:`sample` (its total follows the looks).
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
