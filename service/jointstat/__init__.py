"""jointstat: a two-party secure-computation node (Yao's garbled circuits, semi-honest)."""

__version__ = "0.1.0"
