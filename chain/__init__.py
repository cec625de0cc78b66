"""Mathematics of birth–death chains: stationary and quasi-stationary laws, extinction,
transition probabilities and exact simulation. numpy/scipy/numba only; no I/O."""
from .birth_death import BirthDeathChain
from .environment import (AnnualCurve, AnnualCurves, AnnualMeanTime, AnnualQuasiStationary, AnnualStationary,
                          EnvironmentalChain, environment_nodes)
from .errors import CapTooLargeError, ChainError, RateError
from .passage import PassageCurve
from .quasi import QuasiStationary
from .stationary import Stationary
from .step import StepChain

__all__ = ["BirthDeathChain", "StepChain", "Stationary", "QuasiStationary", "PassageCurve",
           "ChainError", "RateError", "CapTooLargeError", "EnvironmentalChain", "environment_nodes",
           "AnnualCurve", "AnnualCurves", "AnnualMeanTime", "AnnualQuasiStationary", "AnnualStationary"]
