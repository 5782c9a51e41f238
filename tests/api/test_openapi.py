"""openapi.yaml is valid OpenAPI 3.1, and the app conforms to it under fuzzing (schemathesis)."""

from __future__ import annotations

import itertools
from pathlib import Path

import pytest
import schemathesis
import yaml
from conftest import auth, juice_network
from hypothesis import HealthCheck, Phase, given, settings
from openapi_spec_validator import validate
from schemathesis.checks import not_a_server_error
from schemathesis.generation import GenerationMode
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.store import model_id_for

SPEC = Path(__file__).resolve().parents[2] / "openapi.yaml"
FUZZ_KEY = "schemathesis-model"


def test_spec_is_valid_openapi_31():
    spec = yaml.safe_load(SPEC.read_text())
    validate(spec)  # raises on any violation of the OpenAPI 3.1 schema
    assert spec["openapi"] == "3.1.0"


def test_every_route_is_described(app):
    spec = yaml.safe_load(SPEC.read_text())
    described = {
        (path, method.upper())
        for path, item in spec["paths"].items()
        for method in item
        if method in ("get", "post", "patch", "delete", "put")
    }
    served = set()
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        path = rule.rule.replace("<int:number>", "{version}").replace("<model_id>", "{model_id}")
        path = path.replace("<job_id>", "{job_id}")
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            served.add((path, method))
    assert served == described


def test_served_spec_is_the_file(client):
    resp = client.get("/openapi.yaml")
    assert resp.status_code == 200 and resp.data == SPEC.read_bytes()


# The fuzzing drives hypothesis directly from schemathesis's strategies (not its pytest plugin, whose
# internals follow pytest's private attributes): one test per operation and generation mode.
def _operations() -> list[tuple[str, str, GenerationMode]]:
    """(path, method, mode) for every operation; negative cases only where there is input to negate."""
    spec = yaml.safe_load(SPEC.read_text())
    out = []
    for op in (r.ok() for r in schemathesis.openapi.from_path(str(SPEC)).get_all_operations()):
        item = spec["paths"][op.path]
        raw = item[op.method.lower()]
        out.append((op.path, op.method.upper(), GenerationMode.POSITIVE))
        if item.get("parameters") or raw.get("parameters") or raw.get("requestBody"):
            out.append((op.path, op.method.upper(), GenerationMode.NEGATIVE))
    return out


OPERATIONS = _operations()
KNOWN_ID = model_id_for("acme", FUZZ_KEY)
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
]


@pytest.mark.parametrize("path, method, mode", OPERATIONS)
def test_api_conforms_to_its_description(app, client, path, method, mode):
    # a model whose id the fuzzer is steered to, so PATCH and GET reach a real model half the time
    client.post("/v1/models", json=juice_network(), headers={**auth(), "Idempotency-Key": FUZZ_KEY})
    schema = schemathesis.openapi.from_wsgi("/openapi.yaml", app)
    operation = schema[path][method]
    turn = itertools.count()
    strategy = operation.as_strategy(generation_mode=mode)

    @given(case=strategy)
    @settings(
        max_examples=30,
        deadline=None,
        suppress_health_check=list(HealthCheck),
        database=None,
        phases=[Phase.explicit, Phase.generate],
    )
    def run(case):
        steer = method != "DELETE" and next(turn) % 2 == 0  # keep the model alive for the other cases
        if "model_id" in (case.path_parameters or {}) and steer:
            case.path_parameters["model_id"] = KNOWN_ID
        case.call_and_validate(headers=auth(), checks=CHECKS)

    run()
