"""Statistics for the study report: pure functions on the analysis table, no I/O.

- intervals: Wilson, Clopper-Pearson and exact Poisson (Garwood) intervals;
- incidence: Aalen-Johansen cumulative incidence at the horizon with a delta-method
  interval, crude proportions and incidence rates per person-time;
- survival: Kaplan-Meier and Aalen-Johansen curves (death as competing event), and their
  coarsening before release (steps of at least the threshold's events and patients at risk);
- Table 1, outcome combinations and pairwise dependence (odds ratio, phi, observed against
  expected co-occurrence within age band and sex);
- agreement of a definition with a reference standard, and sensitivity and specificity
  corrected for verification bias (Begg and Greenes 1983);
- small-cell suppression of every published table;
- rates from person-time by band, direct standardisation to a standard population (Fay and
  Feuer 1997 gamma interval) and indirect standardisation (SMR); the standard populations
  shipped (``standards/``) or a user's file (:mod:`._standards`, the one module that reads
  files).

Only numpy, scipy and polars are used; reference libraries (statsmodels, lifelines,
scikit-learn) appear in the tests only.
"""

from pipeline.stats._agreement import (
    DiagnosticAccuracy,
    OnsetAgreement,
    diagnostic_accuracy,
    onset_agreement,
)
from pipeline.stats._cif_interval import CifEstimate, aalen_johansen_interval
from pipeline.stats._coarsen import ReleasedCurve, coarsen_curve
from pipeline.stats._combinations import COMBINATIONS_SCHEMA, NO_OUTCOME, outcome_combinations
from pipeline.stats._dependence import (
    DEPENDENCE_SCHEMA,
    Association,
    association_2x2,
    expected_co_occurrence,
    pairwise_dependence,
)
from pipeline.stats._disclosure import protect_cells
from pipeline.stats._incidence import (
    DAYS_PER_YEAR,
    CrudeProportion,
    IncidenceRate,
    crude_proportion,
    cumulative_incidence_at_horizon,
    incidence_rate,
)
from pipeline.stats._intervals import (
    Interval,
    clopper_pearson_interval,
    poisson_exact_interval,
    wilson_interval,
)
from pipeline.stats._rates import (
    StandardisedRatio,
    band_rates,
    crude_rate,
    direct_standardised_rate,
    standardised_ratio,
)
from pipeline.stats._standards import (
    SHIPPED_STANDARDS,
    StandardPopulation,
    parse_age_band,
    read_standard_population,
    shipped_standard,
    weights_for_bands,
)
from pipeline.stats._survival import (
    CENSORED,
    DEATH,
    OUTCOME,
    StepCurve,
    aalen_johansen,
    competing_risk_data,
    kaplan_meier,
)
from pipeline.stats._table_one import (
    TABLE_ONE_SCHEMA,
    baseline_variables,
    smd_binary,
    smd_continuous,
    table_one,
)
from pipeline.stats._verification import CorrectedAccuracy, verification_corrected

__all__ = [
    "CENSORED",
    "COMBINATIONS_SCHEMA",
    "DAYS_PER_YEAR",
    "DEATH",
    "DEPENDENCE_SCHEMA",
    "NO_OUTCOME",
    "OUTCOME",
    "SHIPPED_STANDARDS",
    "TABLE_ONE_SCHEMA",
    "Association",
    "CifEstimate",
    "CorrectedAccuracy",
    "CrudeProportion",
    "DiagnosticAccuracy",
    "IncidenceRate",
    "Interval",
    "OnsetAgreement",
    "ReleasedCurve",
    "StandardPopulation",
    "StandardisedRatio",
    "StepCurve",
    "aalen_johansen",
    "aalen_johansen_interval",
    "association_2x2",
    "band_rates",
    "baseline_variables",
    "clopper_pearson_interval",
    "coarsen_curve",
    "competing_risk_data",
    "crude_proportion",
    "crude_rate",
    "cumulative_incidence_at_horizon",
    "diagnostic_accuracy",
    "direct_standardised_rate",
    "expected_co_occurrence",
    "incidence_rate",
    "kaplan_meier",
    "onset_agreement",
    "outcome_combinations",
    "pairwise_dependence",
    "parse_age_band",
    "poisson_exact_interval",
    "protect_cells",
    "read_standard_population",
    "shipped_standard",
    "smd_binary",
    "smd_continuous",
    "standardised_ratio",
    "table_one",
    "verification_corrected",
    "weights_for_bands",
    "wilson_interval",
]
