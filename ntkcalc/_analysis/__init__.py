"""Analysis: everything that turns a kernel matrix into answers."""

from .forecast import Forecast as Forecast
from .forecast import forecast as forecast
from .ridge import RidgeFit as RidgeFit
from .ridge import ridge_fit as ridge_fit
from .risk import RiskEstimates as RiskEstimates
from .risk import risk as risk
from .spectrum import Spectrum as Spectrum
from .spectrum import effective_rank as effective_rank
from .spectrum import participation_ratio as participation_ratio
from .spectrum import spectrum as spectrum
