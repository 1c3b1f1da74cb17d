"""distinct-n diversity of generated texts, as an `evaluate` metric (calls alignrun.metrics)."""

import datasets
import evaluate

from alignrun.metrics import distinct_n

_DESCRIPTION = (
    "Distinct n-grams divided by total n-grams over all generations, whitespace tokens "
    "(distinct-n, Li et al. 2016); 0.0 when there are no n-grams."
)
_CITATION = "Li et al. 2016, A Diversity-Promoting Objective Function for Neural Conversation Models, NAACL"
_INPUTS = "predictions: generated texts; n (int, default 1): the n-gram length. Returns distinct_<n>."


class DistinctN(evaluate.Metric):
    def _info(self) -> evaluate.MetricInfo:
        return evaluate.MetricInfo(
            description=_DESCRIPTION,
            citation=_CITATION,
            inputs_description=_INPUTS,
            features=datasets.Features({"predictions": datasets.Value("string")}),
        )

    def _compute(self, predictions: list[str], n: int = 1) -> dict[str, float]:
        return {f"distinct_{n}": distinct_n(predictions, n)}
