"""Browser sessions of the desk: the cookie, CSRF, the next page after sign-in, revocation, and the API's walls."""

from __future__ import annotations

from typing import Any

import pytest

from service.records import champions, policies
from service.web import session as desk_session
from tests.service.web.conftest import csrf_of, form_field, sign_in
from tests.support.api import Api
from tests.support.reviews import make_submission


def _cookie(response: Any, name: str = desk_session.SESSION_COOKIE) -> str:
    headers = [h for h in response.headers.getlist("Set-Cookie") if h.startswith(f"{name}=")]
    assert len(headers) == 1, response.headers
    return str(headers[0])


def test_sign_in_sets_a_guarded_cookie_and_lands_on_the_page_asked_for(api: Api, dataset: dict[str, Any]) -> None:
    client = api.app.test_client()
    asked = f"/desk/datasets/{dataset['id']}?per=5"
    first = client.get(asked)
    assert first.status_code == 303
    assert first.headers["Location"].startswith("/desk/sign-in?next=")
    landed = sign_in(client, api.tokens["submitter"], asked)
    assert landed.status_code == 303 and landed.headers["Location"] == asked
    cookie = _cookie(landed)
    # Attributes as RFC 6265 and the SameSite draft name them.
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie and "Path=/desk" in cookie and "Max-Age=28800" in cookie
    assert "Secure" not in cookie  # plain HTTP here; see the HTTPS test below
    page = client.get(asked)
    assert page.status_code == 200 and "diabetes" in page.get_data(as_text=True)
    csp = page.headers["Content-Security-Policy"]
    assert csp.startswith("default-src 'none'") and "script-src" not in csp and "http" not in csp


def test_the_cookie_is_secure_over_https(api: Api) -> None:
    client = api.app.test_client()
    form = client.get("/desk/sign-in", base_url="https://desk.example")
    assert "Secure" in _cookie(form, desk_session.SIGN_IN_COOKIE)
    text = form.get_data(as_text=True)
    landed = client.post("/desk/sign-in", base_url="https://desk.example",
                         data={"csrf": form_field(text, "csrf"), "next": "/desk/", "key": api.tokens["submitter"]})
    assert landed.status_code == 303 and "Secure" in _cookie(landed)


def test_a_session_cookie_never_authorises_an_api_call(api: Api, dataset: dict[str, Any]) -> None:
    client = api.app.test_client()
    cookie = _cookie(sign_in(client, api.tokens["steward"])).split(";")[0]
    sub = make_submission(api.engine, dataset, api.key_ids["submitter"], label="x", scores=[55, 56, 54, 57, 53])
    for method, path, body in [("GET", "/v1/datasets", None), ("GET", f"/v1/datasets/{dataset['id']}/board", None),
                               ("GET", f"/v1/submissions/{sub}", None),
                               ("PUT", f"/v1/datasets/{dataset['id']}/policy", {"champion_margin": 1.0}),
                               ("POST", f"/v1/datasets/{dataset['id']}/champion", {"submission": sub})]:
        # The cookie sent explicitly (a browser would not even send it outside /desk).
        reply = api.client.open(path, method=method, json=body, headers={"Cookie": cookie})
        api.problem(reply, 401)
    reply = api.client.get(f"/v1/submissions/{sub}/report", headers={"Cookie": cookie, "Accept": "application/json"})
    api.problem(reply, 401)
    assert policies.current(api.engine, dataset["id"]) is None and champions.current(api.engine, dataset["id"]) is None


def test_forms_without_their_csrf_token_are_refused(api: Api, dataset: dict[str, Any]) -> None:
    sub = make_submission(api.engine, dataset, api.key_ids["submitter"], label="good", scores=[55, 56, 54, 57, 53])
    anonymous = api.app.test_client()
    anonymous.get("/desk/sign-in")  # holds the sign-in cookie, but sends the form without its token
    refused = anonymous.post("/desk/sign-in", data={"key": api.tokens["steward"], "next": "/desk/"})
    assert refused.status_code == 403 and f"{desk_session.SESSION_COOKIE}=" not in str(refused.headers)
    client = api.app.test_client()
    sign_in(client, api.tokens["admin"])
    good = csrf_of(client, f"/desk/datasets/{dataset['id']}/policy")
    for token in (None, "", "0" * 64, good[:-1] + ("0" if good[-1] != "0" else "1")):
        sent = {} if token is None else {"csrf": token}
        policy = {"primary_metric": "rmse", "champion_margin": "2", **sent}
        assert client.post(f"/desk/datasets/{dataset['id']}/policy", data=policy).status_code == 403
        promote = {"submission": sub, **sent}
        assert client.post(f"/desk/datasets/{dataset['id']}/promote", data=promote).status_code == 403
        assert client.post("/desk/keys", data={"role": "admin", "name": "sneaky", **sent}).status_code == 403
    assert policies.current(api.engine, dataset["id"]) is None and champions.current(api.engine, dataset["id"]) is None
    # A token of another session does not do either.
    other = api.app.test_client()
    sign_in(other, api.tokens["steward"])
    stolen = {"submission": sub, "csrf": good}
    assert other.post(f"/desk/datasets/{dataset['id']}/promote", data=stolen).status_code == 403
    # With its token the same form works.
    done = client.post(f"/desk/datasets/{dataset['id']}/promote", data={"submission": sub, "csrf": good})
    assert done.status_code == 303 and champions.current(api.engine, dataset["id"]) == sub


@pytest.mark.parametrize("target", [
    "https://evil.example/desk/", "//evil.example/desk/", "/\\evil.example", "\\\\evil.example", "/desk\r\nX: y",
    "http:/desk/", "/v1/datasets", "javascript:alert(1)", "desk/", "/deskette", " https://evil.example",
])
def test_the_next_page_is_only_a_local_desk_path(api: Api, target: str) -> None:
    landed = sign_in(api.app.test_client(), api.tokens["submitter"], target)
    assert landed.status_code == 303 and landed.headers["Location"] == "/desk/"


def test_local_next_pages_are_kept() -> None:
    for target in ("/desk/", "/desk", "/desk/submissions/sub_1/report", "/desk/datasets/ds_1?cursor=abc&per=5"):
        assert desk_session.safe_next(target) == target


def test_revoking_the_key_ends_its_sessions(api: Api) -> None:
    client = api.app.test_client()
    sign_in(client, api.tokens["submitter2"])
    assert client.get("/desk/").status_code == 200
    assert api.delete("admin", f"/v1/keys/{api.key_ids['submitter2']}").status_code == 204
    gone = client.get("/desk/")
    assert gone.status_code == 303 and gone.headers["Location"].startswith("/desk/sign-in")
    again = sign_in(api.app.test_client(), api.tokens["submitter2"])
    assert again.status_code == 401 and "not valid or has been revoked" in again.get_data(as_text=True)


def test_expired_tampered_and_signed_out_sessions_are_refused(api: Api, monkeypatch: pytest.MonkeyPatch) -> None:
    client = api.app.test_client()
    landed = sign_in(client, api.tokens["submitter"])
    value = _cookie(landed).split(";")[0].split("=", 1)[1]
    tampered = api.app.test_client()
    tampered.set_cookie(desk_session.SESSION_COOKIE, value[:-2] + ("AA" if not value.endswith("AA") else "BB"),
                        path="/desk")
    assert tampered.get("/desk/").status_code == 303
    monkeypatch.setattr(desk_session, "SESSION_SECONDS", -1)
    assert client.get("/desk/").status_code == 303
    monkeypatch.setattr(desk_session, "SESSION_SECONDS", 8 * 3600)
    token = csrf_of(client, "/desk/")
    out = client.post("/desk/sign-out", data={"csrf": token})
    assert out.status_code == 200 and "signed out" in out.get_data(as_text=True)
    assert client.get("/desk/").status_code == 303


def test_a_report_link_opened_by_a_browser_goes_through_sign_in(api: Api, dataset: dict[str, Any]) -> None:
    sub = make_submission(api.engine, dataset, api.key_ids["submitter"], label="linked", scores=[55, 56, 54, 57, 53])
    client = api.app.test_client()
    browser = {"Accept": "text/html,application/xhtml+xml,application/xml;q=0.9,*/*;q=0.8"}
    first = client.get(f"/v1/submissions/{sub}/report", headers=browser)
    assert first.status_code == 303 and first.headers["Location"] == f"/desk/submissions/{sub}/report"
    second = client.get(first.headers["Location"], headers=browser)
    assert second.status_code == 303
    landed = sign_in(client, api.tokens["submitter2"], f"/desk/submissions/{sub}/report")
    assert landed.headers["Location"] == f"/desk/submissions/{sub}/report"
    page = client.get(landed.headers["Location"])
    assert page.status_code == 200 and "Review of linked" in page.get_data(as_text=True)
    # Programs keep their answers: a key still reads the page, no key and no HTML preference is a 401.
    assert api.get("submitter", f"/v1/submissions/{sub}/report", headers=browser).status_code == 200
    api.problem(api.get(None, f"/v1/submissions/{sub}/report"), 401)
    api.problem(api.get(None, f"/v1/submissions/{sub}/report", headers={"Accept": "*/*"}), 401)
