"""The Shelf's list of dumps: searched, filtered and sorted on the server, so the page works as
a plain list without script (the page's script does the same in the browser as you type).

Nothing here knows Flask: it takes dump objects (the API's dicts) and the query's words.
"""

from __future__ import annotations

from typing import Any, Sequence

from actdoc.io.base import natural_key

#: Sort orders: key -> label. "name" is natural: step2 before step10.
SORTS = {
    "name": "name (step2 before step10)",
    "newest": "newest first",
    "oldest": "oldest first",
    "worst": "most critical layers first",
    "size": "largest first",
}
#: Filters by state: key -> label.
SHOWS = {
    "all": "every dump",
    "critical": "with critical layers",
    "warning": "with warnings",
    "healthy": "healthy only",
    "pending": "queued or analysing",
    "failed": "failed",
}


def searchable(dump: dict[str, Any]) -> str:
    """The words a search looks in: file name, demo title and description, format."""
    demo = dump.get("demo") or {}
    return " ".join(str(part) for part in (dump.get("name", ""), demo.get("title", ""),
                                           demo.get("description", ""),
                                           dump.get("format", ""))).lower()


def verdict_class(dump: dict[str, Any]) -> str:
    """"critical", "warning", "healthy", "pending" or "failed": what the filter looks at."""
    status = dump.get("status")
    if status in ("queued", "analysing"):
        return "pending"
    if status == "failed":
        return "failed"
    verdicts = dump.get("verdicts") or {}
    if verdicts.get("critical"):
        return "critical"
    if verdicts.get("warning"):
        return "warning"
    return "healthy"


def sort_key(order: str):
    def worst(dump):
        verdicts = dump.get("verdicts") or {}
        return (-verdicts.get("critical", 0), -verdicts.get("warning", 0),
                natural_key(dump["name"]))

    return {"name": lambda dump: (natural_key(dump["name"]), dump["created"]),
            "newest": lambda dump: dump["created"],
            "oldest": lambda dump: dump["created"],
            "worst": worst,
            "size": lambda dump: dump.get("size", 0)}[order]


def arranged(dumps: Sequence[dict[str, Any]], query: str = "", order: str = "name",
             show: str = "all") -> dict[str, Any]:
    """The dumps that match ``query`` (every word somewhere in the name or description) and
    ``show``, in ``order``; unknown orders and filters fall back to the defaults."""
    order = order if order in SORTS else "name"
    show = show if show in SHOWS else "all"
    words = query.lower().split()
    for dump in dumps:
        dump["verdict_class"] = verdict_class(dump)
        dump["search_text"] = searchable(dump)
    kept = [dump for dump in dumps
            if all(word in dump["search_text"] for word in words)
            and (show == "all" or dump["verdict_class"] == show)]
    kept.sort(key=sort_key(order), reverse=order in ("newest", "size"))
    return {"dumps": kept, "total": len(dumps), "query": query, "order": order, "show": show,
            "sorts": SORTS, "shows": SHOWS}
