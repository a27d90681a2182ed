"""Unknown addresses answer 404 (RFC 9110 section 15.5.5), known pages 200.

Dash serves its page shell for every path; a signed-in user asking for a page
that does not exist must get the status as well as the words.
"""

from __future__ import annotations

import pytest


@pytest.mark.parametrize("path", ["/no-such-page", "/datasets", "/datasets/1/extra", "/review/nope", "/views/1/2"])
def test_unknown_pages_answer_404_with_a_page(auth, client, path):
    auth.login("analyst")
    response = client.get(path)
    assert response.status_code == 404
    body = response.get_data(as_text=True)
    assert "There is no page at" in body and "<html lang=" in body


@pytest.mark.parametrize("path", ["/", "/upload", "/review", "/review/log", "/views", "/datasets/1", "/views/7"])
def test_every_page_path_still_opens(auth, client, path):
    # a page template such as /datasets/<dataset_id> matches any id; the page itself says when it is unknown
    auth.login("reviewer")
    assert client.get(path).status_code == 200


def test_without_a_session_an_unknown_page_still_asks_to_sign_in(client):
    response = client.get("/admin")
    assert response.status_code == 302 and "/-/login" in response.headers["Location"]
