"""Comparing a report view's counting figures with the recount of a bundle's records
(standard library only): bit for bit in the internal view, and in the published view allowing
what small-count suppression withheld (``None``) or coarsened (``"<11"``)."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from service.log.bundle_recount import Recount

Check = Callable[[str, Any, Any], str | None]


def _same(shown: Any, recounted: Any) -> bool:
    """Equal as JSON values, bit for bit (an int and the float of the same value differ only
    where the view wrote a float: compare the numbers' types too)."""
    if isinstance(recounted, list):
        return (
            isinstance(shown, list)
            and len(shown) == len(recounted)
            and all(_same(a, b) for a, b in zip(shown, recounted, strict=True))
        )
    if isinstance(shown, bool) or isinstance(recounted, bool):
        return shown is recounted
    if isinstance(recounted, float):
        return isinstance(shown, int | float) and float(shown) == recounted
    return type(shown) is type(recounted) and shown == recounted


def _published_ok(shown: Any, recounted: int) -> bool:
    if shown is None:
        return True  # withheld: it could reveal a small count
    if shown == "<11":
        return 1 <= recounted <= 10
    return _same(shown, recounted)


def compare(
    view: Mapping[str, Any], recount: Recount, content_hashes: Mapping[int, str]
) -> str | None:
    """None when every counting figure of ``view`` equals the recount and every version's
    content hash is the one of its policy_version record, else the first that does not (by
    version, group and name)."""
    internal = view.get("view") == "internal"

    def check(where: str, shown: Any, recounted: Any) -> str | None:
        ok = _same(shown, recounted) if internal else _published_ok(shown, recounted)
        if ok:
            return None
        return (
            f"{where} is {shown!r} in the {view.get('view')} view; the records give {recounted!r}"
        )

    if not _same(view.get("versions_covered"), recount.versions):
        return (
            f"the versions covered are {view.get('versions_covered')!r}; the records give "
            f"{recount.versions!r}"
        )
    row_counts = view.get("row_counts")
    if not isinstance(row_counts, dict):
        return "the view has no row counts"
    for name, field in (("recommendations", "n"), ("outcomes", "observed"), ("finals", "finals")):
        key = "final_decisions" if name == "finals" else name
        total = sum(t[field] for t in recount.totals.values())
        shown = row_counts.get(key)
        if internal or not (shown is None and len(recount.versions) > 1):
            problem = check(f"row count {key}", shown, total)
            if problem:
                return problem
    sections = view.get("versions")
    if not isinstance(sections, list) or len(sections) != len(recount.versions):
        return "the view's version sections do not match the versions the records give"
    for section, version in zip(sections, recount.versions, strict=True):
        if isinstance(section, dict) and section.get("content_hash") != content_hashes.get(version):
            return (
                f"version {version}: the content hash is not the one of its policy_version record"
            )
        problem = _compare_section(section, version, recount, check, internal)
        if problem:
            return problem
    return None


def _compare_section(
    section: Any, version: int, recount: Recount, check: Check, internal: bool
) -> str | None:
    if not isinstance(section, dict) or section.get("version") != version:
        return f"the view's section of version {version} is missing or out of order"
    for name, value in recount.totals[version].items():
        problem = check(f"version {version}: total {name}", section["totals"].get(name), value)
        if problem:
            return problem
    names = sorted(g for v, g in recount.cells if v == version)
    rows = section.get("groups")
    if not isinstance(rows, list) or sorted(str(r.get("group")) for r in rows) != names:
        return f"version {version}: the view's groups are not the groups the records give"
    for row in rows:
        g = str(row["group"])
        counts = row.get("counts")
        if not isinstance(counts, dict):
            return f"version {version}, group {g}: no counts"
        recounted = recount.cells[(version, g)]
        if set(counts) != set(recounted):
            return f"version {version}, group {g}: the view's count names differ"
        for name, value in recounted.items():
            problem = check(f"version {version}, group {g}: {name}", counts[name], value)
            if problem:
                return problem
        if internal:
            sums = recount.scores.get((version, g))
            shown = row.get("score_sums")
            if (sums is None) != (shown is None):
                return f"version {version}, group {g}: score sums present in only one of the two"
            for name, value in (sums or {}).items():
                problem = check(
                    f"version {version}, group {g}: score sum {name}", shown[name], value
                )
                if problem:
                    return problem
    expected = sorted({sv for v, sv, _ in recount.shadows if v == version})
    shadow_sections = section.get("shadows")
    if not isinstance(shadow_sections, list):
        return f"version {version}: no shadow sections"
    if [s.get("version") for s in shadow_sections] != expected:
        return f"version {version}: the shadow versions are not those the records give"
    for shadow in shadow_sections:
        sv = int(shadow["version"])
        groups = sorted(g for v, s, g in recount.shadows if v == version and s == sv)
        if [str(x.get("group")) for x in shadow["groups"]] != groups:
            return f"version {version}, shadow {sv}: the groups are not those the records give"
        for x in shadow["groups"]:
            g = str(x["group"])
            for name, value in recount.shadows[(version, sv, g)].items():
                where = f"version {version}, shadow {sv}, group {g}: {name}"
                problem = check(where, x["counts"].get(name), value)
                if problem:
                    return problem
    return None
