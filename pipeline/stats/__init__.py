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
- small-cell suppression of every published table.

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
    "StepCurve",
    "aalen_johansen",
    "aalen_johansen_interval",
    "association_2x2",
    "baseline_variables",
    "clopper_pearson_interval",
    "coarsen_curve",
    "competing_risk_data",
    "crude_proportion",
    "cumulative_incidence_at_horizon",
    "diagnostic_accuracy",
    "expected_co_occurrence",
    "incidence_rate",
    "kaplan_meier",
    "onset_agreement",
    "outcome_combinations",
    "pairwise_dependence",
    "poisson_exact_interval",
    "protect_cells",
    "smd_binary",
    "smd_continuous",
    "table_one",
    "verification_corrected",
    "wilson_interval",
]
