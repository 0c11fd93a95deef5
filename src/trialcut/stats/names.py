"""Names the statistics layer dispatches on, kept in one place so that the plan schema
takes its allowed values from the same lists the engine uses (they cannot drift).

The covariance structure registry itself lives in :mod:`trialcut.stats.covariance`;
a test checks that its keys equal ``COVARIANCE_STRUCTURES``.
"""
COVARIANCE_STRUCTURES: tuple[str, ...] = (
    "unstructured",
    "toeplitz",
    "heterogeneous_toeplitz",
    "ar1",
    "heterogeneous_ar1",
    "compound_symmetry",
    "heterogeneous_compound_symmetry",
    "spatial_exponential",
)

# Degrees-of-freedom methods.  Kenward-Roger's second-derivative term is a separate switch
# (``second_derivatives``), not a method of its own.
DF_METHODS: tuple[str, ...] = (
    "kenward_roger",
    "satterthwaite",
    "participant_split",
    "residual",
)

ESTIMATION_METHODS: tuple[str, ...] = ("reml", "ml")

# Imputation assumptions for values missing after an intercurrent event
# (Carpenter, Roger & Kenward 2013); "mar" also covers every other missing value.
IMPUTATION_ASSUMPTIONS: tuple[str, ...] = (
    "mar",
    "jump_to_reference",
    "copy_reference",
    "copy_increments_in_reference",
)

MULTIPLICITY_METHODS: tuple[str, ...] = ("none", "bonferroni", "holm", "hochberg", "graphical")

# Keys of stats/group_sequential.py:SPENDING_FUNCTIONS, here so that the plan schema can name
# them without importing scipy (tests/stats/test_spending_names.py keeps the two equal).
SPENDING_FUNCTION_NAMES: tuple[str, ...] = ("obrien_fleming_type", "pocock_type", "hwang_shih_decani")
