"""Write explore/data/imagenet_class_phrases.tsv: each ImageNet-1k class with its WordNet parent.

Run once, by a developer, on a machine with WordNet 3.0 (Debian package
``wordnet-base``: /usr/share/wordnet/data.noun). The bundled encoder reads
the written file at run time and needs no WordNet, so it keeps working from
PyPI packages alone.

Each ImageNet class is a WordNet 3.0 noun synset; its wnid (timm's
``ImageNetInfo.index_to_label_name``, e.g. n02123159) is "n" followed by the
synset's byte offset in data.noun. For every class, in timm's index order, the
file holds one tab-separated line::

    wnid <TAB> first name, a kind of parent

where "first name" is the first synonym of timm's class description (what the
``first`` phrasing uses) and "parent" is the first word of the synset's first
hypernym (WordNet pointer ``@``, or ``@i`` for an instance), underscores made
spaces. Examples: "tabby, a kind of domestic cat", "espresso, a kind of
coffee", "strawberry, a kind of berry". The encoder's ``hypernym`` and
``full+hypernym`` phrasings embed these phrases (see
explore/encoders/bundled.py).

Source and licence: WordNet 3.0, Princeton University. Its licence permits
copying, modifying and distributing the database provided the copyright notice,
statements and disclaimer appear on all copies; the file starts with that
notice (comment lines), and explore/data/WORDNET-LICENSE holds it too.

Usage::

    .venv/bin/python scripts/imagenet_class_phrases.py            # writes the file
    .venv/bin/python scripts/imagenet_class_phrases.py --check    # exit 1 if the file differs
"""

from __future__ import annotations

import sys
from pathlib import Path

WORDNET_DIR = Path("/usr/share/wordnet")
OUT = Path(__file__).resolve().parents[1] / "explore" / "data" / "imagenet_class_phrases.tsv"

WORDNET_NOTICE = """\
WordNet Release 3.0

This software and database is being provided to you, the LICENSEE, by
Princeton University under the following license.  By obtaining, using
and/or copying this software and database, you agree that you have
read, understood, and will comply with these terms and conditions.:

Permission to use, copy, modify and distribute this software and
database and its documentation for any purpose and without fee or
royalty is hereby granted, provided that you agree to comply with
the following copyright notice and statements, including the disclaimer,
and that the same appear on ALL copies of the software, database and
documentation, including modifications that you make for internal
use or for distribution.

WordNet 3.0 Copyright 2006 by Princeton University.  All rights reserved.

THIS SOFTWARE AND DATABASE IS PROVIDED "AS IS" AND PRINCETON
UNIVERSITY MAKES NO REPRESENTATIONS OR WARRANTIES, EXPRESS OR
IMPLIED.  BY WAY OF EXAMPLE, BUT NOT LIMITATION, PRINCETON
UNIVERSITY MAKES NO REPRESENTATIONS OR WARRANTIES OF MERCHANT-
ABILITY OR FITNESS FOR ANY PARTICULAR PURPOSE OR THAT THE USE
OF THE LICENSED SOFTWARE, DATABASE OR DOCUMENTATION WILL NOT
INFRINGE ANY THIRD PARTY PATENTS, COPYRIGHTS, TRADEMARKS OR
OTHER RIGHTS.

The name of Princeton University or Princeton may not be used in
advertising or publicity pertaining to distribution of the software
and/or database.  Title to copyright in this software, database and
any associated documentation shall at all times remain with
Princeton University and LICENSEE agrees to preserve same.
"""


def read_noun_synsets(path: Path) -> dict[str, tuple[list[str], list[str]]]:
    """data.noun -> {offset: (words, hypernym offsets)} (format: WordNet's wndb(5WN) manual page)."""
    synsets = {}
    with open(path, encoding="latin-1") as fh:
        for line in fh:
            if line.startswith("  "):  # the licence header
                continue
            fields = line.partition(" | ")[0].split()
            offset, w_cnt = fields[0], int(fields[3], 16)
            words = [fields[4 + 2 * i].replace("_", " ") for i in range(w_cnt)]
            i = 4 + 2 * w_cnt
            p_cnt = int(fields[i])
            hypernyms = []
            for j in range(p_cnt):
                symbol, target, pos = fields[i + 1 + 4 * j : i + 4 + 4 * j]
                if symbol in ("@", "@i") and pos == "n":
                    hypernyms.append(target)
            synsets[offset] = (words, hypernyms)
    return synsets


def class_phrases(wordnet_dir: Path = WORDNET_DIR) -> list[tuple[str, str]]:
    """(wnid, phrase) for the 1000 ImageNet-1k classes, in timm's index order."""
    from timm.data import ImageNetInfo

    synsets = read_noun_synsets(wordnet_dir / "data.noun")
    info = ImageNetInfo()
    rows = []
    for index in range(info.num_classes()):
        wnid = info.index_to_label_name(index)
        description = info.index_to_description(index)
        first = next(part.strip() for part in description.split(",") if part.strip())
        _, hypernyms = synsets[wnid[1:]]
        if not hypernyms:
            raise ValueError(f"{wnid} ({description}) has no hypernym in WordNet")
        parent = synsets[hypernyms[0]][0][0]
        rows.append((wnid, f"{first}, a kind of {parent}"))
    return rows


def file_text(rows: list[tuple[str, str]]) -> str:
    header = [
        "# ImageNet-1k classes (timm ImageNetInfo index order), each as 'first name, a kind of parent',",
        "# the parent being the synset's first WordNet 3.0 hypernym. Written by scripts/imagenet_class_phrases.py",
        "# from Debian's wordnet-base (/usr/share/wordnet/data.noun); do not edit by hand.",
        "# Columns: wnid <TAB> phrase. Derived from WordNet 3.0, under this notice:",
        "#",
        *[f"# {line}".rstrip() for line in WORDNET_NOTICE.splitlines()],
    ]
    return "\n".join(header + [f"{wnid}\t{phrase}" for wnid, phrase in rows]) + "\n"


def main() -> int:
    if not (WORDNET_DIR / "data.noun").is_file():
        print(f"WordNet 3.0 not found at {WORDNET_DIR} (Debian: apt-get install wordnet-base)")
        return 1
    text = file_text(class_phrases())
    if "--check" in sys.argv[1:]:
        same = OUT.is_file() and OUT.read_text(encoding="utf-8") == text
        print(f"{OUT}: {'up to date' if same else 'DIFFERS from WordNet 3.0 + timm'}")
        return 0 if same else 1
    OUT.write_text(text, encoding="utf-8")
    (OUT.parent / "WORDNET-LICENSE").write_text(
        "explore/data/imagenet_class_phrases.tsv is derived from WordNet 3.0 (Princeton University),\n"
        "distributed under the WordNet 3.0 licence, reproduced here:\n\n" + WORDNET_NOTICE,
        encoding="utf-8",
    )
    print(f"wrote {OUT} ({len(text.splitlines())} lines)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
