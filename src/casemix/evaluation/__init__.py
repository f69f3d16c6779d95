"""Expected events, the program table, the case-mix decomposition and the evaluate API."""

from casemix.evaluation.evaluate import Evaluation, evaluate

__all__ = ["Evaluation", "evaluate"]
