"""Command line: parse, load settings, make one library call, render, map errors to exit codes.

Exit codes: 0 success; 1 checks finished and rejected something; 2 usage, config or input error;
3 another run holds the lock.
"""
from __future__ import annotations

import argparse
import logging
import sys

from ..errors import LabelerError
from . import _demo, _evaluate, _label, _rollout, _run, _store, _taxonomy

VERBS = (_demo, _taxonomy, _label, _run, _store, _rollout, _evaluate)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="labeler",
        description="Topic taxonomies, interest footprints and in-profile / new-interest labels "
                    "for recommender logs.")
    parser.add_argument("--version", action="version", version=f"labeler {_version()}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB", required=True)
    for verb in VERBS:
        verb.register(sub)
    return parser


def _version() -> str:
    from ..version import __version__
    return __version__


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING if getattr(args, "quiet", False) else logging.INFO,
                        format="%(levelname)s %(name)s: %(message)s", stream=sys.stderr, force=True)
    for noisy in ("sentence_transformers", "transformers", "httpx", "huggingface_hub"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
    try:
        return int(args.run(args) or 0)
    except LabelerError as exc:
        print(f"labeler {args.verb}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except Exception as exc:  # an engine's own failure becomes a clear message; anything else is a bug
        from ..engines import engine_error
        from ..errors import environment_error
        err = engine_error(exc) or environment_error(exc)
        if err is None:
            raise
        print(f"labeler {args.verb}: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("labeler: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
