"""What the single-site and several-site settings have in common: units, PC-prior rates and the JSON form.

:class:`bayesgeo.fitting.model.FitSpec` (one site) and :class:`bayesgeo.fitting.site_inputs.SiteSpec`
(several sites) are frozen dataclasses that record every setting of a fit and the constants of its
standardisation; both are stored as JSON in the fit's ``settings`` attribute. They share the
methods here, so a fit of either kind is written and read by the same code.
"""

from __future__ import annotations

import json
import typing
from collections.abc import Mapping
from dataclasses import MISSING, asdict, dataclass, field, fields

from bayesgeo.common.io import to_jsonable
from bayesgeo.fitting.priors import Priors, pc_range_rate, pc_sd_rate

__all__ = ["SpecBase"]


@dataclass(frozen=True, kw_only=True)
class SpecBase:
    """The settings every fit records, single-site or several-site, and the methods on them.

    Attributes
    ----------
    covariance : str
        Covariance family name; ``nu`` its smoothness (``None`` for fixed-smoothness families
        other than the exponential, 0.5 for exponential, ...), as in the registry.
    nugget : bool
        Whether the model has a nugget.
    trend : int
        Polynomial order of the trend in the coordinates (0-3).
    covariates : tuple of str
        Covariate names in the trend.
    transform : str or None
        ``"log"`` when the model is for log(values).
    terms : tuple of str
        Labels of the design columns.
    design_attrs : dict
        Attributes of the design matrix (centre and scale of the coordinates and covariates), enough
        for :func:`bayesgeo.explore.trend.design_at` at new locations; per site for several sites.
    value_mean, value_sd : float
        Mean and sd of the (transformed) values, in the units of the modelled values:
        y = (z - value_mean) / value_sd.
    distance_scale : float
        Distances are divided by it (distance units): the largest distance between two data points
        (for several sites, the median over sites of the largest within-site distance).
    range_factor : float
        Practical range / scale parameter of the covariance family.
    metric, distance_units, value_units, value_column : str
        Distance metric (``euclidean`` or ``greatcircle``) and labels from the data.
    priors : Priors
        Resolved priors in data units (units of the transformed values); the population location
        for several sites.
    anisotropy : bool
        Geometric anisotropy (:mod:`bayesgeo.gp.anisotropy`): the range differs by direction.
    approx : str
        The likelihood (:mod:`bayesgeo.gp.engines`): ``dense`` or ``nn`` for one site; as requested
        (``auto``, ``dense`` or ``nn``) for several sites, each of which records its own.
    """

    covariance: str
    nu: float | None
    nugget: bool
    trend: int
    covariates: tuple[str, ...]
    transform: str | None
    terms: tuple[str, ...]
    design_attrs: dict = field(hash=False)
    value_mean: float
    value_sd: float
    distance_scale: float
    range_factor: float
    metric: str
    distance_units: str
    value_units: str
    value_column: str
    priors: Priors
    approx: str = "dense"
    anisotropy: bool = False

    @property
    def model_units(self) -> str:
        """Units of the modelled values: the value units, or ``log(units)`` under the log transform."""
        u = self.value_units or "value units"
        return f"log({u})" if self.transform == "log" else u

    # --- from the model's standardised scale to data units (the one place) ---------------------------

    def practical_range_of(self, range_z):
        """Practical range (distance units) of standardised draws ``practical_range_z``."""
        return range_z * self.distance_scale

    def scale_of(self, range_z):
        """Scale parameter phi (distance units) of standardised draws ``practical_range_z``."""
        return range_z * self.distance_scale / self.range_factor

    def variance_of(self, sd_z):
        """Variance (squared units of the modelled values) of a standardised sd (``sd_z``, ``nugget_sd_z``)."""
        return (sd_z * self.value_sd) ** 2

    def values_of(self, y):
        """Modelled values (log values under the log transform) of standardised values ``y``."""
        return self.value_mean + self.value_sd * y

    def _pc_rates(self) -> dict[str, float]:
        """Rates of the PC priors of the practical range and the partial sd on the standardised scale."""
        p = self.priors
        return {"range": pc_range_rate(p.range[0] / self.distance_scale, p.range[1]),
                "sd": pc_sd_rate(p.sd[0] / self.value_sd, p.sd[1])}

    def to_dict(self) -> dict:
        """JSON-able dictionary (tuples as lists); :meth:`from_dict` inverts it."""
        d = asdict(self)
        for key, value in d.items():
            if isinstance(value, tuple):
                d[key] = list(value)
        d["priors"] = self.priors.to_dict()
        d["design_attrs"] = to_jsonable(self.design_attrs)
        return d

    @classmethod
    def from_dict(cls, d: Mapping):
        """Rebuild a spec from :meth:`to_dict` output (for example read back from a fit file).

        Raises
        ------
        KeyError
            A setting without a default is missing (fields with a default, added later, take it).
        """
        d = dict(d)
        hints = typing.get_type_hints(cls)
        for f in fields(cls):
            if f.name not in d:
                if f.default is MISSING and f.default_factory is MISSING:
                    raise KeyError(f.name)
            elif typing.get_origin(hints[f.name]) is tuple:
                elem = typing.get_args(hints[f.name])[0]
                d[f.name] = tuple(elem(v) for v in d[f.name] or ())
        d["priors"] = Priors.from_dict(d["priors"])
        d["nu"] = None if d.get("nu") is None else float(d["nu"])
        return cls(**d)

    def to_json(self) -> str:
        """:meth:`to_dict` as a JSON string."""
        return json.dumps(self.to_dict())
