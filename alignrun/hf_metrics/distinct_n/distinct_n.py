"""distinct-n diversity of generated texts, as an `evaluate` metric (calls alignrun.metrics)."""

import datasets
import evaluate

from alignrun.metrics import distinct_n

_DESCRIPTION = (
    "Distinct n-grams over all generations (whitespace tokens) divided by the generated tokens, as Li et al. 2016 "
    "define distinct-n (per='tokens', the default), or by the n-grams (per='ngrams', common practice); 0.0 when "
    "the denominator is 0."
)
_CITATION = "Li et al. 2016, A Diversity-Promoting Objective Function for Neural Conversation Models, NAACL"
_INPUTS = (
    "predictions: generated texts; n (int, default 1): the n-gram length; per ('tokens' or 'ngrams'): the "
    "denominator. Returns distinct_<n>_per_token or distinct_<n>_per_ngram."
)


class DistinctN(evaluate.Metric):
    def _info(self) -> evaluate.MetricInfo:
        return evaluate.MetricInfo(
            description=_DESCRIPTION,
            citation=_CITATION,
            inputs_description=_INPUTS,
            features=datasets.Features({"predictions": datasets.Value("string")}),
        )

    def _compute(self, predictions: list[str], n: int = 1, per: str = "tokens") -> dict[str, float]:
        return {f"distinct_{n}_per_{per.removesuffix('s')}": distinct_n(predictions, n, per)}
