"""The link crawl: every address a page links to, followed from the Shelf and from the Compare page
of two dumps until nothing new turns up, answers 200 and stays on this dashboard.

The workspace holds the planted dump and a second one of the same layers, so every page type
(Shelf, Survey, Close-up with its sorting, filtering and paging, Unit card, Compare, the checks help page, downloads)
is reached. Every link is followed, none sampled.
"""

from __future__ import annotations

from html.parser import HTMLParser
from urllib.parse import urljoin, urlsplit

from tests.support.web import post_file, wait_until_done

BASE = "http://localhost"
#: Far more than the planted workspace holds (about 600 addresses): a crawl that grows past it
#: is following a link that makes new links forever.
MAX_PAGES = 5000


class Links(HTMLParser):
    """Every link target of a page: hrefs, script and image sources, form actions."""

    def __init__(self):
        super().__init__()
        self.targets: list[tuple[str, str]] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        for name in ("href", "src", "action"):
            if attributes.get(name):
                self.targets.append((tag, attributes[name]))


def test_every_link_of_every_page_answers_and_stays_local(client, ready_dump, other_dump):
    other = post_file(client, other_dump).get_json()["id"]
    assert wait_until_done(client, other)["status"] == "ready"
    start = ["/", f"/compare?dump={ready_dump}&dump={other}"]
    seen, queue, kinds = set(start), list(start), set()
    failures, remote = [], []
    while queue:
        path = queue.pop()
        response = client.get(path)
        if response.status_code != 200:
            failures.append((path, response.status_code))
            continue
        if response.mimetype != "text/html":
            response.close()
            continue
        kinds.add(urlsplit(path).path.count("/"))
        links = Links()
        links.feed(response.get_data(as_text=True))
        for tag, target in links.targets:
            url = urlsplit(urljoin(BASE + path, target))
            if url.scheme not in ("http", "https") or url.netloc != "localhost":
                remote.append((path, tag, target))
                continue
            if tag == "form":
                continue  # forms post (upload, delete); their targets are tested on their own
            address = url.path + (f"?{url.query}" if url.query else "")
            if address not in seen:
                seen.add(address)
                queue.append(address)
        assert len(seen) < MAX_PAGES
    assert failures == []
    assert remote == []
    # Shelf, Compare, Survey, Close-up and Unit card pages (by depth of their address) all seen.
    assert {1, 2, 4, 6} <= kinds
    assert any("/units/" in address for address in seen)
    assert any("findings.csv?download=1" in address for address in seen)
    assert any("sort=" in address and "state=" in address for address in seen)
