"""Delivery faults (issue 14, item 3 in part): a webhook that redirects is a failed delivery,
the redirect is not followed (no header or signature reaches the other host), and the error
kept in the outbox names the URL without its token."""

from __future__ import annotations

import pytest
from werkzeug import Response


from monitor.live import sinks as mk


@pytest.mark.parametrize("code", [301, 302, 303, 307, 308])
def test_a_redirect_is_a_failure_and_is_not_followed(httpserver, monkeypatch, code):
    monkeypatch.setenv("HOOK_SECRET", "sig-key-not-for-others")
    other = httpserver.url_for("/elsewhere")
    httpserver.expect_request("/hook").respond_with_response(
        Response("moved", status=code, headers={"Location": other}))
    httpserver.expect_request("/elsewhere").respond_with_data("taken")
    hook = mk.WebhookSink(httpserver.url_for("/hook") + "?token=t0k3n-value", timeout=5,
                          secret_env="HOOK_SECRET", headers={"Authorization": "Bearer abc"})
    with pytest.raises(mk.DeliveryError, match=f"HTTP {code}.*redirects are not followed") as err:
        hook.send({"event": "open", "delivery_id": 1, "series": "a"})
    paths = [req.path for req, _ in httpserver.log]
    assert paths == ["/hook"]                      # the other address was never asked
    assert "t0k3n-value" not in str(err.value)     # the URL's token is not in the message
    assert "t0k3n-value" not in repr(hook)


def test_shown_url_drops_user_password_query_and_fragment():
    assert mk.shown_url("http://u:p@127.0.0.1:8080/a/b?x=1#f") == "http://127.0.0.1:8080/a/b"
