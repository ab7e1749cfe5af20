"""Query parameters a route does not define are refused, never silently ignored.

`?formt=npz` used to return JSON: the typo was dropped and the default served. One dependency,
installed on the whole app, compares the names in the query string with the parameters the
matched route declares (its own and its dependencies'), so every route, present and future,
refuses the same way: 422 `unknown_parameter`, with a did-you-mean when one name is close.
"""

from __future__ import annotations

from fastapi import Request
from fastapi.dependencies.models import Dependant
from fastapi.routing import APIRoute

from seedbed.core.request.suggest import did_you_mean
from seedbed.web.errors import ApiError, Fault

UNKNOWN_PARAMETER = "unknown_parameter"


def declared_query_names(route: APIRoute) -> list[str]:
    """The query parameter names a route reads, in declaration order."""
    names: list[str] = []

    def walk(dependant: Dependant) -> None:
        names.extend(p.alias for p in dependant.query_params if p.alias not in names)
        for sub in dependant.dependencies:
            walk(sub)

    walk(route.dependant)
    return names


async def refuse_unknown_query(request: Request) -> None:
    route = request.scope.get("route")
    # Only the documented API is strict: pages and static assets outside the OpenAPI document
    # (the workbench) take cache-busting parameters such as ?v=<hash>.
    if not isinstance(route, APIRoute) or not route.include_in_schema:
        return
    allowed = declared_query_names(route)
    unknown = [key for key in dict.fromkeys(request.query_params.keys()) if key not in allowed]
    if not unknown:
        return
    takes = (
        f"allowed: {', '.join(allowed)}" if allowed else "this endpoint takes no query parameters"
    )
    raise ApiError(
        422,
        [
            Fault(
                key or "(query)",
                UNKNOWN_PARAMETER,
                f"unknown query parameter {key[:60]!r}; {takes}{did_you_mean(key, allowed)}",
            )
            for key in unknown
        ],
    )


__all__ = ["UNKNOWN_PARAMETER", "declared_query_names", "refuse_unknown_query"]
