"""Concurrent audits are capped per worker; one more is refused with 503 and Retry-After.

Driven on the real ASGI app with several uploads in flight at once: each upload's body is
held back by the test until every slot is taken, so the audits really overlap.
"""

from __future__ import annotations

import io
import json

import anyio
import httpx
import numpy as np

from seedbed.settings import Settings as SettingsType
from seedbed.web import Settings, create_app


def npz() -> bytes:
    buf = io.BytesIO()
    np.savez(buf, w=np.eye(4, dtype=np.float32))
    return buf.getvalue()


def test_the_setting_is_read_from_the_environment() -> None:
    assert SettingsType.from_env({"SEEDBED_MAX_CONCURRENT_AUDITS": "2"}).max_concurrent_audits == 2
    assert SettingsType().max_concurrent_audits == 4


def test_one_audit_more_than_the_cap_gets_503_with_retry_after() -> None:
    app = create_app(Settings(max_concurrent_audits=2))
    data = npz()
    started = anyio.Event()
    release = anyio.Event()
    entered = 0

    async def slow_body():  # type: ignore[no-untyped-def]
        nonlocal entered
        entered += 1
        if entered == 2:
            started.set()
        await release.wait()
        yield data

    async def main() -> dict[str, httpx.Response]:
        transport = httpx.ASGITransport(app=app)
        results: dict[str, httpx.Response] = {}
        async with httpx.AsyncClient(transport=transport, base_url="http://audit") as client:

            async def held(label: str) -> None:
                results[label] = await client.post(
                    "/v1/audit", content=slow_body(), headers={"Content-Type": "application/zip"}
                )

            async with anyio.create_task_group() as tg:
                tg.start_soon(held, "first")
                tg.start_soon(held, "second")
                await started.wait()
                third = await client.post(
                    "/v1/audit", content=data, headers={"Content-Type": "application/zip"}
                )
                results["third"] = third
                release.set()
            after = await client.post(
                "/v1/audit", content=data, headers={"Content-Type": "application/zip"}
            )
            results["after"] = after
        return results

    got = anyio.run(main)
    first, second, third, after = (got[k] for k in ("first", "second", "third", "after"))
    refused = [r for r in (first, second, third) if r.status_code == 503]
    assert len(refused) == 1 and refused[0] is third
    assert refused[0].headers["Retry-After"] == "2"
    error = refused[0].json()["error"]
    assert error["code"] == "too_many_audits"
    assert "SEEDBED_MAX_CONCURRENT_AUDITS" in error["message"]
    assert (first.status_code, second.status_code, after.status_code) == (200, 200, 200)
    assert json.loads(after.text)["summary"]["tensors"] == 1
