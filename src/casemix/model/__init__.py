"""The reference model: a Design and a Cox fit, saved as and loaded from JSON."""

from casemix.model.reference import ReferenceModel, fit_reference

__all__ = ["ReferenceModel", "fit_reference"]
