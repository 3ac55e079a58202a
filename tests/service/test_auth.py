"""API keys and roles: hashing, role order, and the access dependencies in a real app."""

from __future__ import annotations

import itertools
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient
from pydantic import SecretStr
from typer.testing import CliRunner

from service.auth import (
    KEY_PREFIX,
    AdminAccess,
    Caller,
    IngestAccess,
    KeyCache,
    KeyStore,
    ReadAccess,
    Role,
    get_settings,
    hash_key,
    key_matches,
    new_key,
    require,
)
from service.keys_cli import keys_app
from service.settings import SETTINGS_FILE_VARIABLE, Settings
from service.store import Store


@dataclass(frozen=True)
class MemoryKey:
    id: int
    name: str
    role: str
    key_hash: str
    created_at: datetime
    revoked_at: datetime | None = None


class MemoryKeyStore:
    """The KeyStore interface over a dict, counting look-ups."""

    def __init__(self) -> None:
        self.keys: dict[int, MemoryKey] = {}
        self.lookups = 0
        self._ids = itertools.count(1)

    def add_api_key(self, name: str, role: str, key_hash: str) -> int:
        key_id = next(self._ids)
        self.keys[key_id] = MemoryKey(key_id, name, role, key_hash, datetime.now(UTC))
        return key_id

    def find_api_key_by_hash(self, key_hash: str) -> MemoryKey | None:
        self.lookups += 1
        return next((k for k in self.keys.values() if k.key_hash == key_hash), None)

    def revoke_api_key(self, key_id_or_name: int | str) -> bool:
        for key in self.keys.values():
            if key.revoked_at is None and key_id_or_name in (key.id, key.name):
                self.keys[key.id] = replace(key, revoked_at=datetime.now(UTC))
                return True
        return False

    def list_api_keys(self) -> list[MemoryKey]:
        return list(self.keys.values())


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def _as_key_store(store: MemoryKeyStore) -> KeyStore:
    return store  # mypy checks here that the test double matches the protocol


def build_app(store: MemoryKeyStore, settings: Settings, cache: KeyCache | None = None) -> FastAPI:
    app = FastAPI()
    app.state.settings = settings
    app.state.keys = _as_key_store(store)
    if cache is not None:
        app.state.key_cache = cache

    @app.get("/estimates")
    async def read_estimates(caller: ReadAccess) -> dict[str, object]:
        return {"name": caller.name, "role": caller.role.value, "key_id": caller.key_id}

    @app.post("/readings")
    async def create_readings(caller: IngestAccess) -> dict[str, str]:
        return {"name": caller.name}

    @app.delete("/keys/{key_id}")
    async def delete_key(key_id: int, caller: AdminAccess) -> dict[str, str]:
        return {"name": caller.name}

    return app


@pytest.fixture
def store() -> MemoryKeyStore:
    return MemoryKeyStore()


@pytest.fixture
def keys(store: MemoryKeyStore) -> dict[str, str]:
    """One valid key per role, plus a revoked ingest key."""
    made = {}
    for role in ("read", "ingest", "admin", "revoked"):
        key = new_key()
        store.add_api_key(f"{role}-key", "ingest" if role == "revoked" else role, hash_key(key))
        made[role] = key
    assert store.revoke_api_key("revoked-key")
    return made


@pytest.fixture
def client(store: MemoryKeyStore, keys: dict[str, str]) -> TestClient:
    return TestClient(build_app(store, Settings(bootstrap_key=None, require_keys=True)))


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


# ---------------------------------------------------------------- keys and hashes


def test_new_key_has_prefix_and_256_random_bits():
    key = new_key()
    assert key.startswith(KEY_PREFIX)
    # token_urlsafe(32): 32 bytes in unpadded base64url are 43 characters.
    assert len(key) == len(KEY_PREFIX) + 43
    assert len({new_key() for _ in range(100)}) == 100


def test_hash_key_is_sha256_hex():
    # FIPS 180-2, appendix B.1: SHA-256("abc").
    assert hash_key("abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    key = new_key()
    assert hash_key(key) == hash_key(key)
    assert hash_key(key) != hash_key(key + "x")


def test_key_matches_compares_against_the_stored_hash():
    key = new_key()
    stored = hash_key(key)
    assert key_matches(key, stored)
    assert key_matches(key, stored.upper())
    assert not key_matches(new_key(), stored)
    assert not key_matches(key, stored[:-1])


# ---------------------------------------------------------------- roles


def test_roles_are_ordered_read_ingest_admin():
    assert Role.READ < Role.INGEST < Role.ADMIN
    assert sorted([Role.ADMIN, Role.READ, Role.INGEST]) == [Role.READ, Role.INGEST, Role.ADMIN]
    # Alphabetically "admin" < "ingest"; the role order must not follow the strings.
    assert Role.ADMIN > Role.INGEST
    assert Role.ADMIN >= "read"
    assert Role.READ <= Role.READ


def test_role_allows_its_own_and_lower_roles_only():
    allowed = {(have, need) for have in Role for need in Role if have.allows(need)}
    assert allowed == {
        (Role.READ, Role.READ),
        (Role.INGEST, Role.READ),
        (Role.INGEST, Role.INGEST),
        (Role.ADMIN, Role.READ),
        (Role.ADMIN, Role.INGEST),
        (Role.ADMIN, Role.ADMIN),
    }


def test_role_refuses_to_compare_with_non_roles():
    with pytest.raises(TypeError):
        assert Role.READ < "superuser"
    with pytest.raises(TypeError):
        assert Role.READ < 3
    with pytest.raises(ValueError):
        Role("superuser")


# ---------------------------------------------------------------- the dependency


def test_request_without_a_key_is_401_with_bearer_challenge(client):
    response = client.get("/estimates")
    assert response.status_code == 401
    assert response.headers["WWW-Authenticate"] == "Bearer"
    assert "missing API key" in response.json()["detail"]


def test_unknown_key_is_401(client):
    response = client.get("/estimates", headers=bearer(new_key()))
    assert response.status_code == 401
    assert response.headers["WWW-Authenticate"] == "Bearer"
    assert response.json()["detail"] == "unknown API key"


def test_revoked_key_is_401(client, keys):
    response = client.post("/readings", headers=bearer(keys["revoked"]))
    assert response.status_code == 401
    assert response.headers["WWW-Authenticate"] == "Bearer"
    assert "revoked" in response.json()["detail"]


def test_other_authorization_schemes_are_not_keys(client, keys):
    response = client.get("/estimates", headers={"Authorization": f"Basic {keys['admin']}"})
    assert response.status_code == 401


@pytest.mark.parametrize(
    ("role", "method", "path"),
    [("read", "post", "/readings"), ("read", "delete", "/keys/1"), ("ingest", "delete", "/keys/1")],
)
def test_lower_role_is_403(client, keys, role, method, path):
    response = client.request(method, path, headers=bearer(keys[role]))
    assert response.status_code == 403
    assert f"has role '{role}'" in response.json()["detail"]
    assert "WWW-Authenticate" not in response.headers


@pytest.mark.parametrize(
    ("role", "method", "path"),
    [
        ("read", "get", "/estimates"),
        ("ingest", "get", "/estimates"),
        ("ingest", "post", "/readings"),
        ("admin", "get", "/estimates"),
        ("admin", "post", "/readings"),
        ("admin", "delete", "/keys/1"),
    ],
)
def test_same_or_higher_role_is_admitted(client, keys, role, method, path):
    response = client.request(method, path, headers=bearer(keys[role]))
    assert response.status_code == 200
    assert response.json()["name"] == f"{role}-key"


def test_x_api_key_header_works_like_bearer(client, keys):
    response = client.post("/readings", headers={"X-API-Key": keys["ingest"]})
    assert response.status_code == 200
    assert client.post("/readings", headers={"X-API-Key": keys["read"]}).status_code == 403
    assert client.post("/readings", headers={"X-API-Key": new_key()}).status_code == 401


def test_bearer_scheme_is_case_insensitive(client, keys):
    response = client.get("/estimates", headers={"Authorization": f"bearer {keys['read']}"})
    assert response.status_code == 200


def test_route_receives_the_caller(client, keys, store):
    response = client.get("/estimates", headers=bearer(keys["ingest"]))
    ingest_id = next(k.id for k in store.keys.values() if k.name == "ingest-key")
    assert response.json() == {"name": "ingest-key", "role": "ingest", "key_id": ingest_id}


def test_bootstrap_key_is_an_admin_key(store, keys):
    bootstrap = new_key()
    client = TestClient(build_app(store, Settings(bootstrap_key=SecretStr(bootstrap))))
    response = client.delete("/keys/1", headers=bearer(bootstrap))
    assert response.status_code == 200
    assert response.json() == {"name": "bootstrap"}
    assert client.get("/estimates", headers={"X-API-Key": bootstrap}).status_code == 200
    # Stored keys still work beside it, and a near miss is still unknown.
    assert client.post("/readings", headers=bearer(keys["ingest"])).status_code == 200
    assert client.get("/estimates", headers=bearer(bootstrap + "x")).status_code == 401


def test_without_require_keys_every_request_is_admin(store):
    client = TestClient(build_app(store, Settings(require_keys=False)))
    response = client.get("/estimates")
    assert response.status_code == 200
    assert response.json() == {"name": "anonymous", "role": "admin", "key_id": None}
    assert client.delete("/keys/1").status_code == 200
    assert store.lookups == 0


def test_settings_dependency_can_be_overridden(store, keys):
    # Built requiring keys; a test swaps the settings dependency, not the code.
    app = build_app(store, Settings(require_keys=True))
    app.dependency_overrides[get_settings] = lambda: Settings(require_keys=False)
    assert TestClient(app).delete("/keys/1").status_code == 200


def test_access_dependency_can_be_overridden(store):
    app = build_app(store, Settings())
    app.dependency_overrides[require(Role.ADMIN)] = lambda: Caller("test", Role.ADMIN)
    client = TestClient(app)
    assert client.delete("/keys/1").json() == {"name": "test"}
    assert client.get("/estimates").status_code == 401


def test_key_with_unknown_stored_role_is_403(store):
    key = new_key()
    store.add_api_key("odd", "superuser", hash_key(key))
    client = TestClient(build_app(store, Settings()))
    response = client.get("/estimates", headers=bearer(key))
    assert response.status_code == 403
    assert "unknown role 'superuser'" in response.json()["detail"]


def test_openapi_documents_both_key_headers(client):
    schemes = client.get("/openapi.json").json()["components"]["securitySchemes"]
    assert schemes["HTTPBearer"] == {
        "type": "http",
        "scheme": "bearer",
        "description": "An API key: `Authorization: Bearer <key>`.",
    }
    assert schemes["APIKeyHeader"]["name"] == "X-API-Key"


# ---------------------------------------------------------------- the cache


def test_lookups_are_cached_and_revocation_takes_effect_after_the_ttl(store, keys):
    clock = FakeClock()
    client = TestClient(build_app(store, Settings(), KeyCache(ttl=5.0, clock=clock)))
    for _ in range(20):
        assert client.post("/readings", headers=bearer(keys["ingest"])).status_code == 200
    assert store.lookups == 1

    assert store.revoke_api_key("ingest-key")
    clock.now += 4.9
    assert client.post("/readings", headers=bearer(keys["ingest"])).status_code == 200
    clock.now += 0.2
    assert client.post("/readings", headers=bearer(keys["ingest"])).status_code == 401
    assert store.lookups == 2


def test_unknown_keys_are_cached_too(store):
    clock = FakeClock()
    client = TestClient(build_app(store, Settings(), KeyCache(ttl=5.0, clock=clock)))
    wrong = new_key()
    for _ in range(5):
        assert client.get("/estimates", headers=bearer(wrong)).status_code == 401
    assert store.lookups == 1


def test_cache_is_bounded(store, keys):
    clock = FakeClock()
    cache = KeyCache(ttl=5.0, max_entries=3, clock=clock)
    client = TestClient(build_app(store, Settings(), cache))
    for _ in range(10):
        client.get("/estimates", headers=bearer(new_key()))
        assert len(cache) <= 3
    assert client.get("/estimates", headers=bearer(keys["read"])).status_code == 200


def test_cache_clear_forgets_revoked_keys_at_once(store, keys):
    cache = KeyCache(ttl=5.0, clock=FakeClock())
    client = TestClient(build_app(store, Settings(), cache))
    assert client.get("/estimates", headers=bearer(keys["read"])).status_code == 200
    store.revoke_api_key("read-key")
    cache.clear()
    assert client.get("/estimates", headers=bearer(keys["read"])).status_code == 401


def test_key_cache_rejects_bad_parameters():
    with pytest.raises(ValueError, match="ttl"):
        KeyCache(ttl=-1.0)
    with pytest.raises(ValueError, match="max_entries"):
        KeyCache(max_entries=0)


def test_app_without_a_key_store_fails_loudly():
    app = FastAPI()
    app.state.settings = Settings()

    @app.get("/estimates")
    async def read_estimates(caller: ReadAccess) -> str:
        return caller.name

    with pytest.raises(RuntimeError, match=r"app\.state\.keys"):
        TestClient(app).get("/estimates", headers=bearer(new_key()))


# ---------------------------------------------------------------- the keys command


runner = CliRunner()


@pytest.fixture
def database(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> str:
    """A fresh SQLite database named by the environment, as `stagewatch keys` reads it."""
    for field in Settings.model_fields:
        monkeypatch.delenv(f"STAGEWATCH_{field.upper()}", raising=False)
    monkeypatch.delenv(SETTINGS_FILE_VARIABLE, raising=False)
    url = f"sqlite:///{tmp_path}/new-folder/stagewatch.db"
    monkeypatch.setenv("STAGEWATCH_DATABASE_URL", url)
    return url


def create(role: str, name: str) -> str:
    result = runner.invoke(keys_app, ["create", "--role", role, "--name", name])
    assert result.exit_code == 0, result.output
    return result.stdout.strip()


def test_keys_create_prints_the_key_once_and_stores_only_its_hash(database, tmp_path):
    result = runner.invoke(keys_app, ["create", "--role", "ingest", "--name", "historian-bridge"])
    assert result.exit_code == 0, result.output
    key = result.stdout.strip()
    assert key.startswith(KEY_PREFIX) and "\n" not in key
    assert "shown only this once" in result.stderr

    with Store(database) as store:
        record = store.find_api_key_by_hash(hash_key(key))
    assert record is not None
    assert (record.name, record.role, record.revoked_at) == ("historian-bridge", "ingest", None)
    raw = b"".join(p.read_bytes() for p in (tmp_path / "new-folder").iterdir())
    assert key.encode() not in raw
    assert hash_key(key).encode() in raw


def test_keys_list_shows_every_key(database):
    create("admin", "ops")
    create("read", "dashboard")
    assert runner.invoke(keys_app, ["revoke", "dashboard"]).exit_code == 0
    result = runner.invoke(keys_app, ["list"])
    assert result.exit_code == 0
    header, ops, dashboard = result.stdout.splitlines()
    assert header.split() == ["id", "name", "role", "created", "revoked"]
    assert ops.split()[:3] == ["1", "ops", "admin"]
    assert ops.endswith("-")
    assert dashboard.split()[:3] == ["2", "dashboard", "read"]
    assert dashboard.rstrip().endswith("Z")


def test_keys_list_when_empty(database):
    result = runner.invoke(keys_app, ["list"])
    assert result.exit_code == 0
    assert result.stdout == ""
    assert "no API keys" in result.stderr


def test_keys_revoke_by_id_and_by_name(database):
    create("read", "first")
    create("read", "second")
    result = runner.invoke(keys_app, ["revoke", "1"])
    assert result.exit_code == 0
    assert "revoked API key '1'" in result.stdout
    assert runner.invoke(keys_app, ["revoke", "second"]).exit_code == 0
    with Store(database) as store:
        assert all(k.revoked_at is not None for k in store.list_api_keys())


def test_keys_revoke_unknown_is_exit_2(database):
    create("read", "only")
    result = runner.invoke(keys_app, ["revoke", "other"])
    assert result.exit_code == 2
    assert result.stderr.strip() == (
        "no valid API key with id or name 'other' (see `stagewatch keys list`)"
    )
    assert runner.invoke(keys_app, ["revoke", "1"]).exit_code == 0
    assert runner.invoke(keys_app, ["revoke", "1"]).exit_code == 2  # already revoked


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--role", "root", "--name", "x"], "unknown role 'root': choose one of read, ingest"),
        (["--role", "read", "--name", "  "], "--name must not be empty"),
        (["--role", "read", "--name", "42"], "--name '42': a name must not be all digits"),
    ],
)
def test_keys_create_bad_input_is_exit_2(database, args, message):
    result = runner.invoke(keys_app, ["create", *args])
    assert result.exit_code == 2
    assert result.stderr.strip().startswith(message)
    assert len(result.stderr.strip().splitlines()) == 1
    assert result.stdout == ""


def test_keys_create_refuses_a_duplicate_name_until_revoked(database):
    create("ingest", "bridge")
    result = runner.invoke(keys_app, ["create", "--role", "ingest", "--name", "bridge"])
    assert result.exit_code == 2
    assert "a key named 'bridge' exists already (id 1)" in result.stderr
    assert runner.invoke(keys_app, ["revoke", "bridge"]).exit_code == 0
    create("ingest", "bridge")


def test_keys_with_an_unsupported_database_is_exit_2(database, monkeypatch):
    monkeypatch.setenv("STAGEWATCH_DATABASE_URL", "mysql://sw:secret@db/stagewatch")
    result = runner.invoke(keys_app, ["list"])
    assert result.exit_code == 2
    assert result.stderr.startswith("database_url: unsupported database URL")
    assert "secret" not in result.stderr


def test_keys_with_invalid_settings_is_exit_2(database, monkeypatch):
    monkeypatch.setenv("STAGEWATCH_PORT", "0")
    result = runner.invoke(keys_app, ["list"])
    assert result.exit_code == 2
    assert result.stderr.strip() == (
        "invalid settings: port: Input should be greater than or equal to 1"
    )


def test_key_created_by_the_command_opens_the_service_until_revoked(database):
    ingest = create("ingest", "bridge")
    with Store(database) as store:
        app = FastAPI()
        app.state.settings = Settings()
        app.state.keys = store
        app.state.key_cache = KeyCache(ttl=5.0, clock=FakeClock())

        @app.post("/readings")
        async def create_readings(caller: IngestAccess) -> dict[str, object]:
            return {"name": caller.name, "key_id": caller.key_id}

        @app.delete("/keys/{key_id}")
        async def delete_key(key_id: int, caller: AdminAccess) -> None:
            return None

        client = TestClient(app)
        response = client.post("/readings", headers={"X-API-Key": ingest})
        assert response.json() == {"name": "bridge", "key_id": 1}
        assert client.delete("/keys/1", headers=bearer(ingest)).status_code == 403

        assert runner.invoke(keys_app, ["revoke", "bridge"]).exit_code == 0
        app.state.key_cache.clear()
        assert client.post("/readings", headers=bearer(ingest)).status_code == 401
