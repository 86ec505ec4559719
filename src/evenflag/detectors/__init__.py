"""Detector plugins: the contract, the built-in detectors and their discovery."""

from evenflag.detectors.base import Detector, build_detector, resolve_detector_class

__all__ = ["Detector", "build_detector", "resolve_detector_class"]
