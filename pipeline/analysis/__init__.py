"""Decoding of turns from population activity, bearing tuning, and their statistics.

Kernels are pure NumPy functions of arrays; ``pipeline.analysis.stages`` (decode) and
``pipeline.analysis.tuning_stage`` map them over the session store.
"""

from pipeline.analysis.bouts import BoutDecode, bout_features, decode_bouts, sample_at
from pipeline.analysis.classify import NestedLogistic
from pipeline.analysis.cv import BlockedKFold, TrialKFold, gap_samples
from pipeline.analysis.decode import (
    ContinuousDecode,
    LagCurve,
    decode_continuous,
    lag_samples,
    lagged_targets,
    make_splitter,
)
from pipeline.analysis.ridge import RidgeBasis, RidgePathCV, pearson_columns, r2_columns
from pipeline.analysis.stats import (
    bh_qvalues,
    bh_reject,
    binomial_interval,
    circular_mean,
    circular_shift_indices,
    permutation_pvalue,
    rayleigh_test,
    resultant_length,
    trial_shuffle_indices,
)
from pipeline.analysis.tuning import (
    EPOCHS,
    UniqueVariance,
    VonMisesFit,
    bearing_design,
    curve_preference,
    epoch_masks,
    fit_von_mises,
    population_summary,
    tuned_flags,
    tuning_curves,
    unique_variance_test,
)

__all__ = [
    "BlockedKFold", "TrialKFold", "gap_samples",
    "BoutDecode", "ContinuousDecode", "LagCurve", "bout_features", "decode_bouts",
    "NestedLogistic", "sample_at",
    "decode_continuous", "lag_samples", "lagged_targets", "make_splitter",
    "RidgeBasis", "RidgePathCV", "pearson_columns", "r2_columns",
    "bh_qvalues", "bh_reject", "binomial_interval", "circular_mean", "circular_shift_indices",
    "permutation_pvalue", "rayleigh_test", "resultant_length", "trial_shuffle_indices",
    "EPOCHS", "UniqueVariance", "VonMisesFit", "bearing_design", "curve_preference",
    "epoch_masks", "fit_von_mises", "population_summary", "tuned_flags", "tuning_curves",
    "unique_variance_test",
]
