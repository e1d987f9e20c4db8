"""qmap: quantitative MRI relaxometry maps (T1, T2, T2*, B1) with uncertainties and phantom QA."""

__version__ = "0.1.0"
