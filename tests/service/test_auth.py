"""The optional bearer token on POST routes."""

from __future__ import annotations

import pytest

from stridecast.service import Settings

ADVANCE = "/v1/models/oscillator/advance"
BODY = {"state": [1.0, 0.0], "t": 1.0}


@pytest.fixture
def token_file(tmp_path):
    path = tmp_path / "token"
    path.write_text("s3cret-token\n")
    return path


@pytest.mark.parametrize("source", ["settings", "file", "environment"])
def test_post_routes_need_the_token(make_client, token_file, monkeypatch, source):
    if source == "settings":
        client = make_client(token="s3cret-token")
    elif source == "file":
        client = make_client(token_file=token_file)
    else:
        monkeypatch.setenv("STRIDECAST_TOKEN", "s3cret-token")
        client = make_client()
    for route, body in [(ADVANCE, BODY),
                        ("/v1/models/oscillator/forecast", {"state": [1, 0], "times": [1]}),
                        ("/v2/models/oscillator/infer", {"inputs": []})]:
        missing = client.post(route, json=body)
        assert missing.status_code == 401
        assert missing.headers["www-authenticate"].startswith("Bearer")
        assert "Authorization: Bearer" in missing.json()["error"]
    wrong = client.post(ADVANCE, json=BODY, headers={"authorization": "Bearer s3cret-tokeN"})
    assert wrong.status_code == 401
    assert wrong.json()["error"] == "the bearer token is not valid."
    basic = client.post(ADVANCE, json=BODY, headers={"authorization": "Basic czNjcmV0"})
    assert basic.status_code == 401
    right = client.post(ADVANCE, json=BODY, headers={"authorization": "Bearer s3cret-token"})
    assert right.status_code == 200


def test_token_checked_before_the_body_is_read(make_client):
    client = make_client(token="t", max_body_bytes=64)
    response = client.post(ADVANCE, content=b"x" * 1000, headers={"content-type": "text/plain"})
    assert response.status_code == 401


def test_get_routes_stay_open(make_client):
    client = make_client(token="s3cret-token")
    for route in ["/healthz", "/readyz", "/metrics", "/v1/models", "/v1/models/oscillator",
                  "/v2/health/live", "/v2/models/oscillator"]:
        assert client.get(route).status_code == 200, route


def test_no_token_means_no_authentication(client):
    assert client.post(ADVANCE, json=BODY).status_code == 200


def test_token_file_problems_stop_the_settings(tmp_path):
    empty = tmp_path / "empty"
    empty.write_text("\n \n")
    with pytest.raises(ValueError, match=r"`token_file` .* is empty; expected a token\."):
        Settings(token_file=empty)
    with pytest.raises(ValueError, match=r"`token_file` .* cannot be read"):
        Settings(token_file=tmp_path / "missing")
    big = tmp_path / "big"
    big.write_bytes(b"a" * 5000)
    with pytest.raises(ValueError, match=r"larger than 4096 bytes"):
        Settings(token_file=big)


def test_token_is_secret_in_reprs(token_file):
    settings = Settings(token="visible?", token_file=token_file)
    assert "visible?" not in repr(settings)
    assert "s3cret" not in repr(settings)
    assert settings.bearer_token() == "s3cret-token"  # the file wins over the variable
