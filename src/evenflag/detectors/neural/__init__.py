"""Neural detectors (torch, CPU by default; CUDA only when present and asked for).

* ``training``: the shared training loop (:class:`NeuralDetector`) and its pieces;
* ``autoencoder``: :class:`AutoencoderDetector`, score = reconstruction error;
* ``deep_svdd``: :class:`DeepSVDDDetector` (Ruff et al., ICML 2018);
* ``fairness``: penalties and the wrappers that train any neural base with
  them (:class:`AdversarialDetector`, :class:`DistributionMatchingDetector`);
* ``fairod``: :class:`FairODDetector` (Shekhar, Shah and Akoglu, AIES 2021).
"""

from evenflag.detectors.neural.autoencoder import AutoencoderDetector
from evenflag.detectors.neural.deep_svdd import DeepSVDDDetector, center_from_mean, radius_from_distances
from evenflag.detectors.neural.fairness import AdversarialDetector, DistributionMatchingDetector
from evenflag.detectors.neural.fairod import FairODDetector
from evenflag.detectors.neural.training import NeuralDetector, mlp

__all__ = ["AdversarialDetector", "AutoencoderDetector", "DeepSVDDDetector", "DistributionMatchingDetector",
           "FairODDetector", "NeuralDetector", "center_from_mean", "mlp", "radius_from_distances"]
