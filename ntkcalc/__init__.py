"""ntkcalc: exact empirical neural tangent kernels of JAX and flax models, and what they tell.

The flow is one-way; each public name below says where it lives:

- model → `Net` (``_adapters``): wrap a JAX function, a flax linen or nnx model, an equinox
  module, a haiku transform, a checkpoint; pick the outputs to study;
- pricing (``_engine``): validation, the structured analysis, each method's cost per parameter
  leaf at this machine's `Rates`;
- `plan` (``_tiles.plan``, the tile layer's first stage): the whole request — method, tile
  sizes, budget, store, devices; ``ntk(..., plan=p)`` runs exactly ``p``;
- tiles (``_tiles``): blocking, the resumable store, devices and hosts;
- `ntk`, `ntk_by_layer` (``_kernel``): the kernel as numpy arrays (or a store on disk);
- analysis (``_analysis``): forecasts, kernel ridge and risk, spectrum, expressivity, alignment,
  the laziness verdict, matrix-free operators;
- sketched features (``_sketch``): φ with E[φφᵀ] = Θ in linear time, analyses on them with
  error bars, top eigenvalues refined by exact products;
- workflows (``_workflows``): drift over a training run, your own run end to end
  (`analyse_run`), the demo, the report, the command line.
"""

from ._adapters.checkpoint import checkpoint_steps as checkpoint_steps
from ._adapters.net import Net as Net
from ._adapters.net import load_checkpoint as load_checkpoint
from ._analysis.alignment import TaskSpectrum as TaskSpectrum
from ._analysis.alignment import alignment as alignment
from ._analysis.alignment import cka as cka
from ._analysis.alignment import kernel_distance as kernel_distance
from ._analysis.alignment import task_spectrum as task_spectrum
from ._analysis.expressivity import FeatureRank as FeatureRank
from ._analysis.expressivity import FeatureRankSample as FeatureRankSample
from ._analysis.expressivity import feature_rank as feature_rank
from ._analysis.expressivity import feature_rank_of as feature_rank_of
from ._analysis.expressivity import feature_rank_over_inits as feature_rank_over_inits
from ._analysis.forecast import Forecast as Forecast
from ._analysis.forecast import forecast as forecast
from ._analysis.hutchpp import Estimate as Estimate
from ._analysis.hutchpp import estimate_alignment as estimate_alignment
from ._analysis.hutchpp import estimate_frobenius as estimate_frobenius
from ._analysis.hutchpp import estimate_participation_ratio as estimate_participation_ratio
from ._analysis.hutchpp import estimate_trace as estimate_trace
from ._analysis.laziness import InitSpread as InitSpread
from ._analysis.laziness import Laziness as Laziness
from ._analysis.laziness import init_spread as init_spread
from ._analysis.laziness import laziness as laziness
from ._analysis.learning_curve import LearningCurve as LearningCurve
from ._analysis.learning_curve import learning_curve as learning_curve
from ._analysis.operator import NTKOperator as NTKOperator
from ._analysis.operator import ntk_operator as ntk_operator
from ._analysis.ridge import RidgeFit as RidgeFit
from ._analysis.ridge import ridge_fit as ridge_fit
from ._analysis.risk import RiskEstimates as RiskEstimates
from ._analysis.risk import risk as risk
from ._analysis.spectrum import Spectrum as Spectrum
from ._analysis.spectrum import effective_rank as effective_rank
from ._analysis.spectrum import participation_ratio as participation_ratio
from ._analysis.spectrum import spectrum as spectrum
from ._engine.rates import Rates as Rates
from ._engine.rates import measure_rates as measure_rates
from ._kernel import ntk as ntk
from ._kernel import ntk_by_layer as ntk_by_layer
from ._kind import KernelArray as KernelArray
from ._kind import per_output_kernel as per_output_kernel
from ._sketch.analysis import FeatureRidge as FeatureRidge
from ._sketch.analysis import Uncertain as Uncertain
from ._sketch.analysis import features_alignment as features_alignment
from ._sketch.analysis import features_distance as features_distance
from ._sketch.analysis import features_relative_change as features_relative_change
from ._sketch.analysis import features_ridge as features_ridge
from ._sketch.analysis import features_spectrum as features_spectrum
from ._sketch.features import Features as Features
from ._sketch.features import ntk_features as ntk_features
from ._sketch.plan import FeaturesPlan as FeaturesPlan
from ._sketch.plan import plan_features as plan_features
from ._sketch.refine import RefinedSpectrum as RefinedSpectrum
from ._sketch.refine import refine_spectrum as refine_spectrum
from ._tiles.plan import Plan as Plan
from ._tiles.plan import plan as plan
from ._tiles.view import RunInfo as RunInfo
from ._tiles.view import StoredKernel as StoredKernel
from ._tiles.view import open_kernel as open_kernel
from ._version import __version__ as __version__
from ._workflows.choice import KernelChoice as KernelChoice
from ._workflows.data import PumpReadings as PumpReadings
from ._workflows.data import pump_readings as pump_readings
from ._workflows.demo import DemoResult as DemoResult
from ._workflows.demo import run_demo as run_demo
from ._workflows.drift import DEFAULT_THRESHOLD as DEFAULT_THRESHOLD
from ._workflows.drift import Drift as Drift
from ._workflows.drift import drift as drift
from ._workflows.report import RunDescription as RunDescription
from ._workflows.report import write_report as write_report
from ._workflows.study import CheckpointAnswers as CheckpointAnswers
from ._workflows.study import GroupChange as GroupChange
from ._workflows.study import RunAnalysis as RunAnalysis
from ._workflows.study import analyse_run as analyse_run
