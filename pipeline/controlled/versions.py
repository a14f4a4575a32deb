"""Ordering the versions of one controlled document found on file, and refusing ambiguous ones (pure).

Several files may hold versions of one specification (by product code) or one method (by method
id). Each version must be told apart by date and by number: two versions with the same
effective date would leave the version in force on that day undecided, and one version number
with two different contents would make a record's "version 1.1" mean two things. Both are
refused with one line naming both files. The same file twice (same bytes) is refused as well:
a copy beside the original is a mistake to tidy, not a second version.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterable
from typing import Any, TypeVar

from pipeline.errors import SpecificationError

Doc = TypeVar("Doc")


def ordered_versions(found: Iterable[tuple[str, str, Doc]], what: str) -> dict[str, tuple[Doc, ...]]:
    """``(file, key, document)`` triples → each key's versions, oldest effective date first.

    ``what`` names the kind of document in messages ("product" or "method").
    """
    by_key: dict[str, list[tuple[str, Any]]] = defaultdict(list)
    for where, key, document in found:
        header = document.document  # type: ignore[attr-defined]
        for other_where, other in by_key[key]:
            seen = other.document
            if seen.sha256 == header.sha256:
                raise SpecificationError(
                    f"{where}: {what} '{key}' version {header.version} is the same file as {other_where}; "
                    "keep one copy")
            if seen.version == header.version:
                raise SpecificationError(
                    f"{where}: {what} '{key}' version {header.version} is also in {other_where} with different "
                    "content; each version needs its own number")
            if seen.effective_from == header.effective_from:
                raise SpecificationError(
                    f"{where}: {what} '{key}' version {header.version} takes effect on {header.effective_from}, "
                    f"the same day as version {seen.version} in {other_where}; which one is in force that day "
                    "would be undecided")
        by_key[key].append((where, document))
    return {key: tuple(doc for _, doc in sorted(entries, key=lambda e: e[1].document.effective_from))
            for key, entries in by_key.items()}
