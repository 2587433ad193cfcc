"""Regenerate openapi_examples/: an invented two-group bundle, a manifest of requests and their answers.

Run after changing the service's schemas; the tests replay every case in the manifest
against the app and compare the answers with the stored ones.
"""

from __future__ import annotations

import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "openapi_examples"
sys.path.insert(0, str(ROOT))

from calibration.bundle import DirectoryStore  # noqa: E402
from calibration.bundle.canonical import document_of  # noqa: E402
from calibration.io import ResponseData  # noqa: E402
from calibration.irt.simulate import simulate_responses  # noqa: E402
from calibration.pipeline import calibrate_data  # noqa: E402

# Example API keys: public on purpose (examples only); the app in the replay test trusts their hashes.
KEYS = {"reader": "example-read-key", "scorer": "example-score-key", "publisher": "example-publish-key"}
SCOPES = {"reader": ["read"], "scorer": ["score"], "publisher": ["publish", "read", "score"]}


def example_bundle():  # type: ignore[no-untyped-def]
    """A small invented calibration: 'pantry-checkout', 6 tasks, two delivery modes, one DIF item."""
    rng = np.random.default_rng(7)
    a = np.array([1.4, 1.0, 1.7, 0.9, 1.2, 1.5])
    b = np.array([-1.0, -0.4, 0.0, 0.3, 0.8, 1.2])
    blocks, modes = [], []
    for g, mode in enumerate(("paper", "tablet")):
        theta = rng.normal(0.2 * g, 1.0, 900)
        bg = b.copy()
        if g == 1:
            bg[3] += 0.9  # task T4 is harder on a tablet
        blocks.append(simulate_responses(a, bg, theta, rng))
        modes += [mode] * 900
    x = np.vstack(blocks)
    data = ResponseData(
        ids=tuple(f"P{i:04d}" for i in range(x.shape[0])),
        item_ids=tuple(f"T{j + 1}" for j in range(6)),
        responses=x,
        n_categories=np.full(6, 2),
        models=("2pl",) * 6,
        groups=tuple(modes),
        source="pantry-checkout-invented.csv",
    )
    bundle = calibrate_data(data, name="pantry-checkout", reference_group="paper").bundle
    return bundle.model_copy(update={"created_at": "2026-12-01T00:00:00Z"})


def example_second_cycle(parent):  # type: ignore[no-untyped-def]
    """The next cycle of 'pantry-checkout', linked to the first: a new task T7, T2 drifted, both modes 0.3 stronger."""
    from calibration.pipeline.link import LinkRequest

    rng = np.random.default_rng(8)
    a = np.array([1.4, 1.0, 1.7, 0.9, 1.2, 1.5, 1.1])
    b = np.array([-1.0, 0.4, 0.0, 0.3, 0.8, 1.2, 0.5])  # T2 0.8 harder than in the first cycle
    blocks, modes = [], []
    for g, mode in enumerate(("paper", "tablet")):
        theta = rng.normal(0.3 + 0.2 * g, 1.0, 900)
        bg = b.copy()
        if g == 1:
            bg[3] += 0.9
        blocks.append(simulate_responses(a, bg, theta, rng))
        modes += [mode] * 900
    x = np.vstack(blocks)
    data = ResponseData(
        ids=tuple(f"Q{i:04d}" for i in range(x.shape[0])),
        item_ids=tuple(f"T{j + 1}" for j in range(7)),
        responses=x,
        n_categories=np.full(7, 2),
        models=("2pl",) * 7,
        groups=tuple(modes),
        source="pantry-checkout-cycle-2-invented.csv",
    )
    bundle = calibrate_data(data, name="pantry-checkout", link=LinkRequest(parent)).bundle
    return bundle.model_copy(update={"created_at": "2026-12-02T00:00:00Z"})


DIFF_PATH = "/v1/bundles/pantry-checkout/diff?from=1&to=2"


CASES = [
    {"name": "healthz", "method": "GET", "path": "/healthz", "status": 200},
    {"name": "readyz", "method": "GET", "path": "/readyz", "status": 200},
    {"name": "bundles", "method": "GET", "path": "/v1/bundles", "key": "reader", "status": 200},
    {
        "name": "versions",
        "method": "GET",
        "path": "/v1/bundles/pantry-checkout/versions",
        "key": "reader",
        "status": 200,
    },
    {
        "name": "score",
        "method": "POST",
        "path": "/v1/bundles/pantry-checkout/scores",
        "key": "scorer",
        "request": "score_request",
        "status": 200,
        "response": "score_response",
    },
    {
        "name": "score_pinned",
        "method": "POST",
        "path": "/v1/bundles/pantry-checkout/versions/1/scores",
        "key": "scorer",
        "request": "score_request",
        "status": 200,
        "response": "score_response",
    },
    {
        "name": "alias",
        "method": "PUT",
        "path": "/v1/bundles/pantry-checkout/aliases/production",
        "key": "publisher",
        "request": "alias_request",
        "status": 200,
        "response": "alias_response",
    },
    {
        "name": "publish_same",
        "method": "PUT",
        "path": "/v1/bundles/pantry-checkout/versions/1",
        "key": "publisher",
        "request": "bundle",
        "status": 200,
        "response": "publish_response",
    },
    {"name": "problem_401", "method": "GET", "path": "/v1/bundles", "status": 401},
    {
        "name": "problem_403",
        "method": "PUT",
        "path": "/v1/bundles/pantry-checkout/aliases/production",
        "key": "reader",
        "request": "alias_request",
        "status": 403,
    },
    {
        "name": "problem_404",
        "method": "POST",
        "path": "/v1/bundles/pantry-checkout/versions/9/scores",
        "key": "scorer",
        "request": "score_request",
        "status": 404,
    },
    {
        "name": "problem_409",
        "method": "PUT",
        "path": "/v1/bundles/pantry-checkout/versions/1",
        "key": "publisher",
        "request": "bundle_other",
        "status": 409,
    },
    {
        "name": "problem_422",
        "method": "POST",
        "path": "/v1/bundles/pantry-checkout/scores",
        "key": "scorer",
        "request": "score_request_unknown_item",
        "status": 422,
    },
]


def main() -> int:
    from fastapi.testclient import TestClient

    from service.main import create_app
    from service.security import key_digest
    from service.settings import Settings

    OUT.mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp())
    try:
        bundle = DirectoryStore(work).publish(example_bundle())
        (OUT / "bundle.json").write_text(json.dumps(document_of(bundle), indent=1) + "\n")
        other = bundle.model_copy(update={"created_at": "2026-12-02T00:00:00Z", "hash": ""})
        (OUT / "bundle_other.json").write_text(json.dumps(document_of(other), indent=1) + "\n")
        requests = {
            "score_request": {
                "responses": [
                    {
                        "id": "R-1001",
                        "group": "paper",
                        "answers": {"T1": 1, "T2": 1, "T3": 0, "T4": 1, "T5": 0, "T6": 0},
                    },
                    {"id": "R-1002", "group": "tablet", "answers": {"T1": 1, "T2": 0, "T3": 1, "T4": 0, "T5": 1}},
                ],
                "options": {"method": "eap", "include_summed_score": True},
            },
            "score_request_unknown_item": {"responses": [{"id": "R-1003", "group": "paper", "answers": {"T9": 1}}]},
            "alias_request": {"version": 1},
        }
        for name, body in requests.items():
            (OUT / f"{name}.json").write_text(json.dumps(body, indent=1) + "\n")
        keys = ";".join(f"{n}:{'+'.join(SCOPES[n])}:{key_digest(k)}" for n, k in KEYS.items())
        app = create_app(Settings(store=str(work), api_keys=keys, log_level="warning"))
        manifest = []
        with TestClient(app, raise_server_exceptions=False) as client:
            for case in CASES:
                headers = {"Authorization": f"Bearer {KEYS[case['key']]}"} if "key" in case else {}
                body = json.loads((OUT / f"{case['request']}.json").read_text()) if "request" in case else None
                reply = client.request(case["method"], case["path"], json=body, headers=headers)
                if reply.status_code != case["status"]:
                    raise SystemExit(
                        f"{case['name']}: expected {case['status']}, got {reply.status_code}: {reply.text}"
                    )
                response_name = case.get("response", case["name"])
                (OUT / f"{response_name}.json").write_text(json.dumps(reply.json(), indent=1) + "\n")
                manifest.append({**case, "response": response_name})
        # The comparison of two versions: its own store (the replayed store holds one version); replayed by
        # tests/service/test_api.py.
        cycles = Path(tempfile.mkdtemp())
        DirectoryStore(cycles).put_version(bundle)
        second = DirectoryStore(cycles).publish(example_second_cycle(bundle))
        (OUT / "bundle_v2.json").write_text(json.dumps(document_of(second), indent=1) + "\n")
        app = create_app(Settings(store=str(cycles), api_keys=keys, log_level="warning"))
        with TestClient(app) as client:
            reply = client.get(DIFF_PATH, headers={"Authorization": f"Bearer {KEYS['reader']}"})
            assert reply.status_code == 200, reply.text
            (OUT / "diff.json").write_text(json.dumps(reply.json(), indent=1) + "\n")
            # A release: version 1 promoted, then version 2, then rolled back; the history names the key.
            alias = "/v1/bundles/pantry-checkout/aliases/production"
            for version in (1, 2, 1):
                moved = client.put(
                    alias, json={"version": version}, headers={"Authorization": f"Bearer {KEYS['publisher']}"}
                )
                assert moved.status_code == 200, moved.text
            reply = client.get(alias, headers={"Authorization": f"Bearer {KEYS['reader']}"})
            assert reply.status_code == 200, reply.text
            (OUT / "alias_history.json").write_text(json.dumps(reply.json(), indent=1) + "\n")
        shutil.rmtree(cycles, ignore_errors=True)
        (OUT / "cases.json").write_text(
            json.dumps(
                {
                    "_about": "Requests replayed by tests/service/test_examples.py against an app whose store holds "
                    "bundle.json (invented data) and which trusts the example keys below.",
                    "keys": KEYS,
                    "scopes": SCOPES,
                    "cases": manifest,
                },
                indent=1,
            )
            + "\n"
        )
        print(f"wrote {len(manifest)} cases to {OUT}")
    finally:
        shutil.rmtree(work)
    return 0


if __name__ == "__main__":
    sys.exit(main())
