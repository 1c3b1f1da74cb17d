"""What a command shows while it works: our progress bars, and the libraries' own bars and log chatter
(weight-loading and shard-writing bars, hub retries when offline) kept out of the way unless --debug."""

from __future__ import annotations

import os
import sys
import warnings
from typing import Any

DEBUG_ENV = "ALIGNRUN_DEBUG"  # set by --debug; inherited by worker processes (torchrun, Ray)
# Read by transformers and huggingface_hub when first imported (they reset their loggers' levels then).
QUIET_ENV = {"TRANSFORMERS_VERBOSITY": "error", "HF_HUB_VERBOSITY": "error", "HF_HUB_DISABLE_PROGRESS_BARS": "1"}


def setup(debug: bool) -> None:
    """Called once by the command line: --debug shows everything, otherwise the libraries are quietened."""
    if debug:
        os.environ[DEBUG_ENV] = "1"
    else:
        quiet_libraries()


def quiet_libraries() -> None:
    """Library progress bars off, library logs to errors only, their FutureWarnings hidden (not under --debug).
    Works before or after the libraries are imported."""
    if os.environ.get(DEBUG_ENV):
        return
    for name, value in QUIET_ENV.items():
        os.environ.setdefault(name, value)
    warnings.filterwarnings("ignore", category=FutureWarning, module=r"(transformers|peft|accelerate)\..*")
    if "huggingface_hub" in sys.modules:
        import huggingface_hub

        huggingface_hub.utils.logging.set_verbosity_error()
        huggingface_hub.utils.disable_progress_bars()
    if "transformers" in sys.modules:
        import transformers

        transformers.utils.logging.set_verbosity_error()
        transformers.utils.logging.disable_progress_bar()


def progress(total: int, desc: str, unit: str, disable: bool, initial: int = 0) -> Any:
    """A tqdm bar on stderr, like the training loop's."""
    from tqdm.auto import tqdm

    return tqdm(total=total, initial=initial, disable=disable, desc=desc, unit=unit, dynamic_ncols=True)
