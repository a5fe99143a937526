"""Apportion: guardrail-aware personalized allocation from randomized experiments."""

__version__ = "0.1.0"
