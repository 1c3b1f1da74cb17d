"""Break the PPO loop on purpose and check that the fast tests notice.

Copies the tree to a temporary folder, applies one known-wrong change at a time (a plain text replacement), runs
the tests meant to catch it and prints "caught" or "MISSED" per change; exits 1 if any change is missed (2 if the
tests fail even without a change, or a change no longer applies). Standard library only:

    python scripts/mutate.py            # the tests named beside each change (a few minutes)
    python scripts/mutate.py --suite    # the whole fast suite of the loop's three test files for every change
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
WIRING = "tests/test_trainer.py::test_train_step_wiring"
SUITE = ["tests/test_ppo.py", "tests/test_trainer.py", "tests/test_fast_paths.py", "-m", "not slow"]


@dataclass(frozen=True)
class Mutation:
    name: str
    file: str
    before: str
    after: str
    tests: tuple[str, ...]


MUTATIONS = (
    Mutation("reference keeps its adapters on", "alignrun/models.py",
             "with self.lm.disable_adapter():\n                yield self.lm", "yield self.lm",
             ("tests/test_trainer.py::test_reference_is_the_base_and_stored_logprobs_are_the_policys",
              "tests/test_causal.py::test_reference_and_stored_logprobs_match_an_unpadded_forward")),
    Mutation("old log-probs replaced by reference log-probs", "alignrun/trainer.py",
             "ppo.policy_loss(logp, part.logp,", "ppo.policy_loss(logp, part.ref_logp,", (WIRING,)),
    Mutation("policy-loss sign flipped", "alignrun/trainer.py",
             "loss = pl + p.value_weight * vl", "loss = -pl + p.value_weight * vl", (WIRING,)),
    Mutation("optimizer.step() removed", "alignrun/trainer.py",
             "            optimizer.step()\n", "", (WIRING,)),
    Mutation("KL controller fed the per-token mean", "alignrun/trainer.py",
             "_gather_mean(accelerator, kl.sum(dim=1))",
             "_gather_mean(accelerator, ppo.masked_mean(kl, ro.response_mask, dim=1))", (WIRING,)),
    Mutation("whitening over padding", "alignrun/trainer.py",
             "ppo.whiten(advantages, ro.response_mask,", "ppo.whiten(advantages, torch.ones_like(ro.response_mask),",
             (WIRING,)),
    Mutation("EOS dropped from the mask", "alignrun/rollout.py",
             "after_eos = (torch.cumsum(is_eos, dim=1) - is_eos) > 0", "after_eos = torch.cumsum(is_eos, dim=1) > 0",
             ("tests/test_trainer.py::test_response_mask_keeps_the_first_eos_and_drops_what_follows",)),
)


def run_tests(tree: Path, tests: list[str]) -> bool:
    """True when pytest passes on `tree` (the copy is first on the import path)."""
    env = {**os.environ, "PYTHONPATH": str(tree)}
    done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", *tests],
                          cwd=tree, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return done.returncode == 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--suite", action="store_true", help="run the loop's whole fast suite for every change")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="alignrun-mutate-") as tmp:
        tree = Path(tmp) / "tree"
        shutil.copytree(ROOT, tree, ignore=shutil.ignore_patterns(
            ".git", ".venv", "__pycache__", ".*_cache", ".alignrun-cache", "runs", "bench-results"))
        selected = {m.name: SUITE if args.suite else list(m.tests) for m in MUTATIONS}
        every = sorted({t for tests in selected.values() for t in tests if not t.startswith("-")})
        if not run_tests(tree, SUITE if args.suite else every):
            print("the tests fail on the unchanged tree; fix them first", file=sys.stderr)
            return 2
        missed = 0
        for m in MUTATIONS:
            path = tree / m.file
            original = path.read_text()
            if original.count(m.before) != 1:
                print(f"{m.name}: the text to change is not found exactly once in {m.file}; update scripts/mutate.py",
                      file=sys.stderr)
                return 2
            path.write_text(original.replace(m.before, m.after))
            caught = not run_tests(tree, selected[m.name])
            path.write_text(original)
            missed += not caught
            print(f"{'caught' if caught else 'MISSED'}  {m.name}  ({m.file})", flush=True)
    return 1 if missed else 0


if __name__ == "__main__":
    sys.exit(main())
