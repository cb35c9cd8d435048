"""Option helpers shared by the verbs, so flags are spelled alike everywhere."""
from __future__ import annotations

import argparse
from typing import Any

from ..config import JobConfig, load_job_config


def add_common(p: argparse.ArgumentParser, config: bool = True) -> None:
    if config:
        p.add_argument("--config", metavar="TOML", help="job settings file (see README 'Configuration')")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bars or info logs")


def show_progress(args: argparse.Namespace) -> bool:
    """Progress bars only on a terminal, and never under -q (a scheduler's log stays clean)."""
    import sys
    return not getattr(args, "quiet", False) and sys.stderr.isatty()


def add_input(p: argparse.ArgumentParser) -> None:
    p.add_argument("--timezone", help="IANA zone for naive timestamps (default: reject them)")
    p.add_argument("--epoch-unit", choices=["s", "ms", "us", "ns"], help="unit of integer epoch timestamps")


def add_embedder(p: argparse.ArgumentParser) -> None:
    p.add_argument("--embedder", choices=["model", "hashing"], default="model",
                   help="'model' = the sentence-embedding model (default); 'hashing' = fast word "
                        "hashing, for trials and tests")


def job_config(args: argparse.Namespace, flags: dict[str, Any] | None = None) -> JobConfig:
    flags = dict(flags or {})
    inp = {k: v for k, v in (("timezone", getattr(args, "timezone", None)),
                             ("epoch_unit", getattr(args, "epoch_unit", None))) if v is not None}
    if inp:
        flags["input"] = {**flags.get("input", {}), **inp}
    return load_job_config(getattr(args, "config", None), flags)


def make_embedder(args: argparse.Namespace, cfg):
    from ..embed import HashingEmbedder, SentenceEmbedder
    if getattr(args, "embedder", "model") == "hashing":
        return HashingEmbedder(256)
    return SentenceEmbedder(cfg.taxonomy.model, cfg.taxonomy.model_path, cfg.taxonomy.batch_size)
