"""Run one atheris campaign: ``python -m fuzz.run TARGET [--seconds N] [--corpus DIR]``.

A finding (an exception other than ValidationToolError, or a failed assertion) stops the campaign with
the crashing input written to ``fuzz/findings/`` by libFuzzer; turn it into a regression test in
tests/adversarial/test_fuzz_parsers.py.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import atheris

# Coverage feedback from our own parsers only (instrumenting every library would take minutes).
with atheris.instrument_imports(include=["federation", "site_agent", "fuzz"]):
    import site_agent.config
    import site_agent.mapping  # noqa: F401 - imported here so the lazily imported parsers are instrumented
    from fuzz.seeds import seeds
    from fuzz.targets import TARGETS, check


def main() -> None:
    parser = argparse.ArgumentParser(prog="fuzz.run", description=__doc__.splitlines()[0])
    parser.add_argument("target", choices=sorted(TARGETS))
    parser.add_argument("--seconds", type=int, default=600)
    parser.add_argument("--corpus", type=Path, default=None, help="corpus folder (default fuzz/corpus/TARGET)")
    args = parser.parse_args()
    corpus = args.corpus or Path(__file__).parent / "corpus" / args.target
    corpus.mkdir(parents=True, exist_ok=True)
    for i, seed in enumerate(seeds(args.target)):
        (corpus / f"seed-{i}").write_bytes(seed)
    findings = Path(__file__).parent / "findings"
    findings.mkdir(exist_ok=True)
    target = TARGETS[args.target]

    def one_input(data: bytes) -> None:
        check(target, data)

    libfuzzer = [
        sys.argv[0],
        f"-max_total_time={args.seconds}",
        "-max_len=65536",
        "-rss_limit_mb=4096",
        "-timeout=20",
        f"-artifact_prefix={findings}/{args.target}-",
        str(corpus),
    ]
    atheris.Setup(libfuzzer, one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
