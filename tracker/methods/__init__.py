"""The statistical methods, in one place: pure numpy (and scipy's distributions), no pandas, no I/O.

Every function is vectorised over cells and cites its source in its docstring.

- :mod:`.variance`: Taylor (ultimate cluster) variance and covariance, rules for strata with a
  single cluster, design degrees of freedom, covariance across waves from shared clusters.
- :mod:`.intervals`: Wilson, Korn-Graubard and t intervals; Newcombe's difference interval.
- :mod:`.tests`: p-value adjustment, Satterthwaite degrees of freedom, the difference test.
- :mod:`.power`: minimum detectable change.
- :mod:`.raoscott`: the Rao-Scott test of a two-way table.
- :mod:`.bases`: Kish effective base, design effect and design base.
"""

from .bases import design_base, design_effect, kish_base
from .intervals import korn_graubard_interval, newcombe_interval, t_interval, wilson_interval
from .power import min_detectable_change, min_detectable_share_change
from .raoscott import RaoScott, rao_scott_table
from .tests import ADJUST_METHODS, adjust_pvalues, difference_test, satterthwaite_df
from .variance import (
    SINGLE_CLUSTER_RULES,
    PsuTotals,
    cross_wave_covariance,
    psu_totals,
    single_cluster_strata,
    taylor_covariance,
    taylor_variance,
)

__all__ = [
    "ADJUST_METHODS", "SINGLE_CLUSTER_RULES", "PsuTotals", "RaoScott", "adjust_pvalues",
    "cross_wave_covariance", "design_base", "design_effect", "difference_test", "kish_base",
    "korn_graubard_interval", "min_detectable_change", "min_detectable_share_change",
    "newcombe_interval", "psu_totals", "rao_scott_table", "satterthwaite_df",
    "single_cluster_strata", "t_interval", "taylor_covariance", "taylor_variance", "wilson_interval",
]
