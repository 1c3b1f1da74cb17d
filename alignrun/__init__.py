"""alignrun: short LoRA policy-optimisation and detoxification runs for small seq2seq models on a CPU."""

__version__ = "0.1.0"
