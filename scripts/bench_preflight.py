"""Time the polarity preflight with a ~60M-parameter BERT-shaped classifier (random weights, offline).

    python scripts/bench_preflight.py [--threads N] [--repeat 3] [--out FILE.json]

Builds the classifier from a config (BERT-base width, 6 layers, 24k vocabulary: about 62M parameters),
trains a small word-piece tokenizer on the probe texts, saves both to a temporary folder, then times
loading and check_polarity (scoring every probe). Target: at most 10 s on 2 CPU cores.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import _bench_common as common  # first: offline settings and alignrun's start-up thread settings
from tokenizers import Tokenizer, models, normalizers, pre_tokenizers, processors, trainers
from transformers import BertConfig, BertForSequenceClassification, PreTrainedTokenizerFast

from alignrun.config import RewardSection
from alignrun.preflight import builtin_probes, check_polarity
from alignrun.reward import load_scorer


def build(folder: Path) -> int:
    texts = [p.text for p in builtin_probes()]
    tok = Tokenizer(models.WordPiece(unk_token="[UNK]"))
    tok.normalizer = normalizers.BertNormalizer(lowercase=True)
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.train_from_iterator(texts, trainers.WordPieceTrainer(
        vocab_size=2000, special_tokens=["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]))
    tok.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]", special_tokens=[("[CLS]", tok.token_to_id("[CLS]")), ("[SEP]", tok.token_to_id("[SEP]"))])
    tokenizer = PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]",
                                        cls_token="[CLS]", sep_token="[SEP]", mask_token="[MASK]")
    config = BertConfig(vocab_size=24_000, hidden_size=768, num_hidden_layers=6, num_attention_heads=12,
                        intermediate_size=3072, max_position_embeddings=512, pad_token_id=0,
                        id2label={0: "benign", 1: "harmful"}, label2id={"benign": 0, "harmful": 1})
    model = BertForSequenceClassification(config)
    model.save_pretrained(folder)
    tokenizer.save_pretrained(folder)
    return sum(p.numel() for p in model.parameters())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--threads", type=int, default=0, help="torch threads (0: as `alignrun run` chooses them)")
    parser.add_argument("--repeat", type=int, default=3, help="time check_polarity this many times")
    parser.add_argument("--out", help="also write the figures to this JSON file")
    args = parser.parse_args()
    threads_reason = common.set_bench_threads(args.threads)
    setup = common.machine()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "classifier"
        params = build(folder)
        section = RewardSection(source=str(folder), harmful_labels=["harmful"])
        start = time.perf_counter()
        scorer = load_scorer(section, "reward")
        load_s = time.perf_counter() - start
        times = []
        for _ in range(args.repeat):
            start = time.perf_counter()
            report = check_polarity(scorer, section)
            times.append(time.perf_counter() - start)
    n = report.n_harmful + report.n_benign
    print(f"classifier: {params / 1e6:.1f}M parameters, torch threads {setup['threads']} ({threads_reason})")
    print(f"load: {load_s:.2f} s")
    print(f"preflight ({n} probes, batch {section.batch_size}): " + ", ".join(f"{t:.2f}" for t in times)
          + f" s (best {min(times):.2f} s; target <= 10 s)")
    if args.out:
        common.write_results(args.out, {"setup": {**setup, "threads_reason": threads_reason}, "params": params,
                                        "probes": n, "load_s": load_s, "preflight_s": times})


if __name__ == "__main__":
    main()
