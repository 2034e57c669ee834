"""Exception types of the analysis core; each message says what to fix."""

from __future__ import annotations


class AnalysisError(Exception):
    """Base class of every error the analysis core raises on purpose."""


class InvalidInputError(AnalysisError, ValueError):
    """An argument or a data file does not have the form the function needs."""


class ModelInputError(InvalidInputError):
    """A model file, its sidecar or its architecture cannot be used as given."""


class ImageInputError(InvalidInputError):
    """An image is missing, unreadable or over the pixel limit."""


class GradientUnavailableError(AnalysisError, RuntimeError):
    """The model's forward pass gives no gradients, so Grad-CAM cannot run."""


class NotEnoughLabelsError(AnalysisError):
    """There are no usable labels yet for the result asked for (none, or all marked not sure, or no image complete)."""
