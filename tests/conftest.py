"""Test-wide settings.

BLAS threads: the filter's matrix-vector products are small; on a shared
2-core machine a multithreaded BLAS makes them 10-40x slower, so the suite
(like ``casecloud`` itself, see service/cli.py) runs BLAS single-threaded.
This must happen before numpy is first imported.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")


# ------------------------------------------------------------ message contracts
# Every message the service produces in any test (estimates, alerts, dead letters, whatever the
# transport) is validated against the exported JSON Schemas in schemas/json/ with the
# ``jsonschema`` library (Draft 2020-12), independently of the pydantic models that produced it:
# the processor's ``publish`` callback is wrapped. A message that breaks the published contract
# fails the test that produced it. (Transport unit tests that publish hand-made bytes are not
# service output and are not checked.)
import pytest  # noqa: E402

_SCHEMA_OF_KIND = {"estimates": "estimate", "alerts": "alert", "dead_letters": "dead_letter"}
_VALIDATORS: dict = {}


def contract_errors(name: str, document) -> list[str]:
    """Why ``document`` does not satisfy ``schemas/json/<name>.json`` (Draft 2020-12); [] if it does."""
    if name not in _VALIDATORS:
        import json
        from pathlib import Path

        import jsonschema

        path = Path(__file__).resolve().parents[1] / "schemas" / "json" / f"{name}.json"
        schema = json.loads(path.read_text(encoding="utf-8"))
        jsonschema.Draft202012Validator.check_schema(schema)
        _VALIDATORS[name] = jsonschema.Draft202012Validator(schema)
    errors = sorted(_VALIDATORS[name].iter_errors(document), key=lambda e: list(e.path))
    return [f"{'/'.join(map(str, e.path)) or '(top)'}: {e.message[:200]}" for e in errors]


def _checked(publish):
    async def checked_publish(records):
        import json

        for r in records:
            name = _SCHEMA_OF_KIND[r.kind]
            errors = contract_errors(name, json.loads(r.value))
            assert not errors, f"published {r.kind} record breaks schemas/json/{name}.json: " + "; ".join(errors[:5])
        return await publish(records)

    return checked_publish


@pytest.fixture(autouse=True)
def _published_messages_satisfy_the_json_schemas(monkeypatch, request):
    if request.node.nodeid.startswith("tests/filters/"):
        return  # the numerical core publishes nothing
    from service.runtime.processor import RecordProcessor

    original = RecordProcessor.handle

    async def handle(self, record, publish, *args, **kwargs):
        return await original(self, record, _checked(publish), *args, **kwargs)

    monkeypatch.setattr(RecordProcessor, "handle", handle)
