"""Tokens, scopes, anonymous loopback reading, body size limit, path-like ids."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from fusion.service.tokens import TOKENS_FILE, TokenBook
from tests.cli.conftest import invoke, tree_digest
from tests.service.conftest import ServiceStore, csv_bytes, make_client

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def _bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def test_token_add_prints_it_once_and_stores_only_a_salted_hash(store_copy: ServiceStore) -> None:
    res = invoke("token", "add", "desk1", "--scope", "submit", "--store", store_copy.root)
    assert res.exit_code == 0, res.stderr
    token = res.stdout.strip()
    text = (store_copy.root / TOKENS_FILE).read_text()
    assert token not in text and token.split(".")[-1] not in text
    entry = json.loads(text)["tokens"]["desk1"]
    assert entry["scope"] == "submit" and len(bytes.fromhex(entry["salt"])) == 16
    listed = invoke("token", "list", "--store", store_copy.root)
    assert "desk1" in listed.stdout and "submit" in listed.stdout and token not in listed.stdout
    assert TokenBook(store_copy.root).verify(token) is not None


def test_two_tokens_with_one_name_are_refused(store_copy: ServiceStore) -> None:
    assert invoke("token", "add", "a", "--store", store_copy.root).exit_code == 0
    res = invoke("token", "add", "a", "--store", store_copy.root)
    assert res.exit_code == 1 and res.stderr.startswith("Error: a token named 'a' exists")


def test_bad_scope_is_a_one_line_error(store_copy: ServiceStore) -> None:
    res = invoke("token", "add", "x", "--scope", "root", "--store", store_copy.root)
    assert res.exit_code == 1 and res.stderr.startswith("Error: scope 'root' is unknown")


@pytest.mark.parametrize("case", ["none", "revoked", "wrong-scope", "garbage"])
def test_submission_without_a_valid_submit_token_is_refused_and_changes_nothing(
    store_copy: ServiceStore, case: str
) -> None:
    client = make_client(store_copy, loopback=True)
    book = TokenBook(store_copy.root)
    headers: dict[str, str] = {"Content-Type": "text/csv"}
    if case == "revoked":
        token = book.add("gone", "submit")
        book.revoke("gone")
        headers |= _bearer(token)
    elif case == "wrong-scope":
        headers |= _bearer(book.add("reader", "read"))
    elif case == "garbage":
        headers |= _bearer("mfs_0000.nope")
    before = tree_digest(store_copy.root)
    res = client.post(
        "/v1/submissions", content=csv_bytes(store_copy.held_event(0)), headers=headers
    )
    assert res.status_code == (403 if case == "wrong-scope" else 401)
    assert res.json()["error"]["code"] in {"token_required", "token_invalid", "scope_insufficient"}
    assert tree_digest(store_copy.root) == before


def test_adopt_needs_admin(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=True)
    submit = TokenBook(store_copy.root).add("s", "submit")
    res = client.put(
        "/v1/active-models/ML", json={"version_id": store_copy.v2}, headers=_bearer(submit)
    )
    assert res.status_code == 403
    assert client.get("/v1/models").json()["active"] == store_copy.v1
    res = client.post("/v1/active-models/ML/rollback")
    assert res.status_code == 401


def test_reading_needs_a_token_off_loopback_unless_configured(service_store: ServiceStore) -> None:
    remote = make_client(service_store, loopback=False)
    assert remote.get("/v1/events").status_code == 401
    local = make_client(service_store, loopback=True)
    assert local.get("/v1/events").status_code == 200
    closed = make_client(
        service_store, loopback=True, toml="\n[service]\nanonymous_read_on_loopback = false\n"
    )
    assert closed.get("/v1/events").status_code == 401


def test_revoked_read_token_is_refused_at_the_next_request(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=False)
    book = TokenBook(store_copy.root)
    token = book.add("r", "read")
    assert client.get("/v1/models", headers=_bearer(token)).status_code == 200
    book.revoke("r")
    assert client.get("/v1/models", headers=_bearer(token)).status_code == 401


def test_oversized_body_is_refused_with_413_and_changes_nothing(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, toml="\n[service]\nmax_body_bytes = 2048\n")
    token = TokenBook(store_copy.root).add("s", "submit")
    before = tree_digest(store_copy.root)
    body = csv_bytes(store_copy.held_event(0))
    assert len(body) > 2048
    res = client.post("/v1/submissions", content=body, headers=_bearer(token))
    assert res.status_code == 413 and res.json()["error"]["code"] == "body_too_large"

    def chunks():  # no Content-Length: the limit is enforced while streaming
        for i in range(0, len(body), 500):
            yield body[i : i + 500]

    res = client.post("/v1/submissions", content=chunks(), headers=_bearer(token))
    assert res.status_code == 413
    assert tree_digest(store_copy.root) == before


@pytest.mark.parametrize(
    "path",
    [
        "/v1/events/..%2F..%2Fmanifest.json",
        "/v1/events/%2E%2E%2Fmanifest.json",
        "/v1/events/..",
        "/v1/models/..%2F..%2Fmanifest.json/dry-run",
        "/v1/models/ML-..%2F..%2F..%2Fmanifest/dry-run",
    ],
)
def test_path_like_ids_reach_no_file(service_store: ServiceStore, path: str) -> None:
    client = make_client(service_store, loopback=True)
    res = client.get(path)
    assert res.status_code in (400, 404), res.text
    assert "generation" not in res.text and "batches" not in res.text


def test_version_id_with_a_parent_folder_part_is_refused(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    res = client.get("/v1/models/..-x/dry-run")
    assert res.status_code == 422 and res.json()["error"]["code"] == "invalid_parameter"


def test_revoking_an_unknown_token_is_a_one_line_error(store_copy: ServiceStore) -> None:
    res = invoke("token", "revoke", "nobody", "--store", store_copy.root)
    assert res.exit_code == 1
    assert res.stderr.startswith("Error: no token named 'nobody'") and res.stderr.count("\n") == 1


@pytest.mark.parametrize("name", ["", "a b", "../x", "x" * 65, "<b>"])
def test_token_names_outside_the_allowed_characters_are_refused(
    store_copy: ServiceStore, name: str
) -> None:
    res = invoke("token", "add", name, "--store", store_copy.root)
    assert res.exit_code == 1 and "is not allowed" in res.stderr
    assert not (store_copy.root / TOKENS_FILE).exists()


def test_serve_without_a_store_is_a_one_line_error(tmp_path: Path) -> None:
    res = invoke("serve", "--store", tmp_path / "missing", "--port", "1")
    assert res.exit_code == 1 and res.stderr.startswith("Error: ")
    assert res.stderr.count("\n") == 1
