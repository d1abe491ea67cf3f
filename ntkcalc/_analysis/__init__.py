"""Analysis: everything that turns a kernel matrix into answers."""

from .alignment import TaskSpectrum as TaskSpectrum
from .alignment import alignment as alignment
from .alignment import cka as cka
from .alignment import kernel_distance as kernel_distance
from .alignment import task_spectrum as task_spectrum
from .forecast import Forecast as Forecast
from .forecast import forecast as forecast
from .hutchpp import Estimate as Estimate
from .hutchpp import estimate_alignment as estimate_alignment
from .hutchpp import estimate_frobenius as estimate_frobenius
from .hutchpp import estimate_participation_ratio as estimate_participation_ratio
from .hutchpp import estimate_trace as estimate_trace
from .learning_curve import LearningCurve as LearningCurve
from .learning_curve import learning_curve as learning_curve
from .operator import NTKOperator as NTKOperator
from .operator import ntk_operator as ntk_operator
from .ridge import RidgeFit as RidgeFit
from .ridge import ridge_fit as ridge_fit
from .risk import RiskEstimates as RiskEstimates
from .risk import risk as risk
from .spectrum import Spectrum as Spectrum
from .spectrum import effective_rank as effective_rank
from .spectrum import participation_ratio as participation_ratio
from .spectrum import spectrum as spectrum
