"""Statistics of grain populations, in one namespace (pure functions on numpy arrays).

The functions live in four modules by idea; this module gathers them so that
callers write ``st.moment_mean``, ``st.binomial_ci``, ...:

- :mod:`~grainhabit.plugins.survey.size_distribution`: moment means, size
  distributions, D-values and the lognormal fit (ISO 9276-1, ISO 9276-2);
- :mod:`~grainhabit.plugins.survey.habit_statistics`: habit fractions, alpha
  summaries (determined values and bounds), tabular aspect ratios, the
  monodispersity call;
- :mod:`~grainhabit.plugins.survey.intervals`: the bootstrap, exact intervals
  for fractions, grains clustered by frame;
- :mod:`~grainhabit.plugins.survey.comparisons`: tests and differences between
  two samples, Holm's family-wise error.

Nothing here knows about results stores or xarray.
"""

from __future__ import annotations

from grainhabit.plugins.habit.vocabulary import HABITS, TABULAR_HABITS

from grainhabit.plugins.survey.size_distribution import (  # noqa: F401
    moment_mean,
    sauter_diameter,
    de_brouckere_diameter,
    size_distribution,
    size_quantile,
    d_values,
    mean_sd_cov,
    lognormal_fit,
    lognormal_pdf,
)

from grainhabit.plugins.survey.habit_statistics import (  # noqa: F401
    MONODISPERSE_COV_PCT,
    habit_codes,
    habit_fractions,
    alpha_median_iqr,
    tabular_aspect_ratio_mean,
    monodispersity,
    alpha_states,
    alpha_in_range,
)

from grainhabit.plugins.survey.intervals import (  # noqa: F401
    BootstrapCI,
    bootstrap_ci,
    cov_pct_rows,
    median_rows,
    nanmedian_rows,
    habit_fraction_rows,
    binomial_ci,
    proportion_ci,
    cluster_codes,
    Spread,
    clustered_mean,
    clustered_bootstrap,
    t_interval,
    weighted_mean_stat,
    weighted_cov_stat,
    weighted_ratio_stat,
    weighted_moment_mean_stat,
    weighted_quantile_stat,
)

from grainhabit.plugins.survey.comparisons import (  # noqa: F401
    ks_test,
    habit_chi2,
    median_difference_ci,
    Difference,
    difference,
    holm,
)


__all__ = [
    "HABITS",
    "TABULAR_HABITS",
    "moment_mean",
    "sauter_diameter",
    "de_brouckere_diameter",
    "size_distribution",
    "size_quantile",
    "d_values",
    "mean_sd_cov",
    "lognormal_fit",
    "lognormal_pdf",
    "MONODISPERSE_COV_PCT",
    "habit_codes",
    "habit_fractions",
    "alpha_median_iqr",
    "tabular_aspect_ratio_mean",
    "monodispersity",
    "alpha_states",
    "alpha_in_range",
    "BootstrapCI",
    "bootstrap_ci",
    "cov_pct_rows",
    "median_rows",
    "nanmedian_rows",
    "habit_fraction_rows",
    "binomial_ci",
    "proportion_ci",
    "cluster_codes",
    "Spread",
    "clustered_mean",
    "clustered_bootstrap",
    "t_interval",
    "weighted_mean_stat",
    "weighted_cov_stat",
    "weighted_ratio_stat",
    "weighted_moment_mean_stat",
    "weighted_quantile_stat",
    "ks_test",
    "habit_chi2",
    "median_difference_ci",
    "Difference",
    "difference",
    "holm",
]
