"""The review server's API and each of its security rules, with a plain HTTP client on 127.0.0.1."""

from __future__ import annotations

import http.client
import io
import json
import threading

import pytest
from PIL import Image

from conftest import encode, textured
from labelprep import decisions, manifest
from labelprep.cli import main
from labelprep.pipeline import prepare
from labelprep.reviews import make_server


def make_tree(root):
    """Two classes; a byte copy (cat/a, cat/b), a cross-label near copy (cat/c, dog/c), distinct files."""
    for name, seed in (("cat/a.jpg", 1), ("cat/d.jpg", 2), ("cat/e.jpg", 3), ("dog/f.jpg", 4),
                       ("dog/g.jpg", 5), ("dog/h.jpg", 6), ("cat/c.jpg", 7), ("cat/i.jpg", 8)):
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        (root / name).write_bytes(encode(textured((96, 64), seed)))
    (root / "cat" / "b.jpg").write_bytes((root / "cat" / "a.jpg").read_bytes())
    (root / "dog" / "c.jpg").write_bytes(encode(textured((96, 64), 7), quality=60))
    (root / "dog" / "tiny.jpg").write_bytes(encode(textured((16, 16), 9)))
    return root


@pytest.fixture
def served(tmp_path):
    root = make_tree(tmp_path / "photos")
    out = tmp_path / "out"
    prepare(root, out, jobs=1, seed=1)
    server = make_server(out)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield server
    server.shutdown()
    server.server_close()
    thread.join(timeout=10)


def request(server, method, path, *, body=None, headers=None, token=True, host=None):
    """One request to the server on 127.0.0.1; returns (status, headers, body bytes)."""
    conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=30)
    sent = dict(headers or {})
    if token is True and method == "GET":
        path += ("&" if "?" in path else "?") + f"token={server.token}"
    elif token is True:
        sent.setdefault("X-Review-Token", server.token)
    if body is not None and not isinstance(body, bytes):
        body = json.dumps(body).encode()
        sent.setdefault("Content-Type", "application/json")
    conn.putrequest(method, path, skip_host=True)
    conn.putheader("Host", host or f"127.0.0.1:{server.port}")
    for k, v in sent.items():
        conn.putheader(k, v)
    conn.putheader("Content-Length", str(len(body or b"")))
    conn.endheaders(body)
    response = conn.getresponse()
    data = response.read()
    conn.close()
    return response.status, dict(response.getheaders()), data


def api(server, path):
    status, _, data = request(server, "GET", path)
    assert status == 200, data
    return json.loads(data)


def decide(server, **body):
    status, _, data = request(server, "POST", "/api/decide", body=body)
    assert status == 200, data
    return json.loads(data)


def row_of(server, path):
    return server.queue.row_of(path)


GET_ROUTES = ["/", "/assets/review.js", "/assets/review.css", "/api/summary", "/api/items?tab=clusters",
              "/api/image?row=0"]


class TestSecurity:
    def test_bound_to_loopback_only(self, served):
        assert served.socket.getsockname()[0] == "127.0.0.1"
        assert served.url.startswith(f"http://127.0.0.1:{served.port}/?token=")

    @pytest.mark.parametrize("route", GET_ROUTES)
    def test_every_request_needs_the_token(self, served, route):
        assert request(served, "GET", route, token=False)[0] == 403
        sep = "&" if "?" in route else "?"
        assert request(served, "GET", f"{route}{sep}token=wrong{served.token[5:]}", token=False)[0] == 403
        assert request(served, "GET", route)[0] in (200, 404)  # 404: a row without preview

    def test_token_is_new_each_run(self, served):
        other = make_server(served.folder)
        try:
            assert other.token != served.token and len(other.token) >= 40
        finally:
            other.server_close()

    @pytest.mark.parametrize("host", ["evil.example", "evil.example:{port}", "localhost:{port}",
                                      "127.0.0.1:1", "127.0.0.1"])
    def test_host_must_be_loopback(self, served, host):
        """DNS rebinding: a page of another site, its name rebound to 127.0.0.1, sends its name."""
        status, _, data = request(served, "GET", "/api/summary", host=host.format(port=served.port))
        assert status == 421, data
        status, _, _ = request(served, "POST", "/api/decide", body={"row": 0, "action": "drop"},
                               host=host.format(port=served.port))
        assert status == 421
        assert not served.decisions_path.exists()

    def test_images_by_row_only(self, served):
        row = row_of(served, "cat/a.jpg")
        status, headers, data = request(served, "GET", f"/api/image?row={row}")
        assert status == 200 and headers["Content-Type"] == "image/jpeg"
        assert data[:2] == b"\xff\xd8"  # JPEG starts with the SOI marker (ITU-T T.81, B.1.1.3)
        with Image.open(io.BytesIO(data)) as im:
            assert max(im.size) <= 240
        status, _, data = request(served, "GET", f"/api/image?row={row}&size=full")
        with Image.open(io.BytesIO(data)) as im:
            assert im.size == (96, 64)
        for query in ("path=cat/a.jpg", "row=../../etc/passwd", f"row={len(served.queue.paths)}", "row=-1"):
            assert request(served, "GET", f"/api/image?{query}")[0] in (400, 404)

    def test_rows_outside_the_roots_are_not_served(self, served, tmp_path):
        """A manifest edited to name a file outside the scanned folder, by '..' or through a link
        planted in the folder, is still never read."""
        secret = tmp_path / "secret.jpg"
        secret.write_bytes(encode(textured((64, 64), 3)))
        (served.roots / "cat" / "link.jpg").symlink_to(secret)
        m = manifest.read(served.folder / "manifest.csv")
        m.loc[0, "path"], m.loc[1, "path"] = "../secret.jpg", "cat/link.jpg"
        m.loc[[0, 1], "fault"] = ""
        manifest.write(m, served.folder / "manifest.csv", force=True)
        served.load()
        assert request(served, "GET", "/api/image?row=0")[0] == 404
        assert request(served, "GET", "/api/image?row=1")[0] == 404
        assert request(served, "GET", f"/api/image?row={row_of(served, 'cat/d.jpg')}")[0] == 200

    def test_assets_are_a_fixed_list(self, served):
        for route in ("/assets/../manifest.csv", "/assets/review.html", "/assets/%2e%2e/manifest.csv",
                      "/manifest.csv", "/decisions.csv"):
            assert request(served, "GET", route)[0] == 404

    def test_state_changes_are_post_with_the_token_header(self, served):
        row = row_of(served, "cat/d.jpg")
        assert request(served, "GET", f"/api/decide?row={row}&action=drop")[0] == 405
        assert request(served, "GET", "/api/rerun")[0] == 405
        # the token in the query does not count for a POST: a cross-site form could carry it
        status, _, _ = request(served, "POST", f"/api/decide?token={served.token}", token=False,
                               body={"row": row, "action": "drop"})
        assert status == 403
        status, _, _ = request(served, "POST", "/api/decide", body={"row": row, "action": "drop"},
                               headers={"Origin": "http://evil.example"})
        assert status == 403
        form = f"row={row}&action=drop".encode()
        status, _, _ = request(served, "POST", "/api/decide", body=form,
                               headers={"Content-Type": "application/x-www-form-urlencoded"})
        assert status == 415
        assert request(served, "PUT", "/api/decide", body={"row": row, "action": "drop"})[0] == 405
        assert not served.decisions_path.exists()
        assert request(served, "POST", "/api/decide", body={"row": row, "action": "drop"},
                       headers={"Origin": f"http://127.0.0.1:{served.port}"})[0] == 200
        assert served.decisions_path.read_text() == "path,action,value,note\ncat/d.jpg,drop,,\n"

    def test_decisions_name_rows_not_paths(self, served):
        for body in ({"row": "cat/d.jpg", "action": "drop"}, {"row": 10**6, "action": "drop"},
                     {"row": 0, "action": "join", "other": "../x"}, {"row": 0, "action": "erase"}):
            assert request(served, "POST", "/api/decide", body=body)[0] == 400
        big = {"row": 0, "action": "keep", "note": "x" * 70_000}
        assert request(served, "POST", "/api/decide", body=big)[0] == 413
        assert not served.decisions_path.exists()

    def test_page_headers(self, served):
        status, headers, data = request(served, "GET", "/")
        assert status == 200
        assert "default-src 'none'" in headers["Content-Security-Policy"]
        assert "frame-ancestors 'none'" in headers["Content-Security-Policy"]
        assert headers["X-Frame-Options"] == "DENY" and headers["Referrer-Policy"] == "no-referrer"
        assert served.token.encode() in data


class TestApi:
    def test_pages_cover_every_cluster_once(self, served):
        total = api(served, "/api/summary")["clusters"]
        seen = []
        for offset in range(0, total, 1):
            seen += [item["id"] for item in api(served, f"/api/items?tab=clusters&offset={offset}&limit=1")["items"]]
        assert sorted(seen) == sorted(set(seen)) and len(seen) == total == 2
        assert request(served, "GET", "/api/items?tab=clusters&limit=0")[0] == 400
        assert request(served, "GET", "/api/items?tab=clusters&limit=1000")[0] == 400
        assert request(served, "GET", "/api/items?tab=secrets")[0] == 400
        conflict = api(served, "/api/items?tab=conflicts")["items"]
        assert [sorted(m["path"] for m in c["members"]) for c in conflict] == [["cat/c.jpg", "dog/c.jpg"]]
        files = api(served, "/api/items?tab=files")["items"]
        assert [f["members"][0]["path"] for f in files] == ["dog/tiny.jpg"]

    def test_link_evidence(self, served):
        """Each member of a cluster says why it sits with the kept file: byte-identical, or its
        closest hash pair within the grouping radius."""
        items = api(served, "/api/items?tab=clusters")["items"]
        by_path = {m["path"]: m for item in items for m in item["members"]}
        copy = next(by_path[p] for p in ("cat/a.jpg", "cat/b.jpg") if not by_path[p]["keeper"])
        assert copy["evidence"] == [{"hash": "sha256", "bits": 0, "what": "byte-identical"}]
        near = next(by_path[p] for p in ("cat/c.jpg", "dog/c.jpg") if not by_path[p]["keeper"])
        best = near["evidence"][0]
        assert best["bits"] <= 8 and best["what"].endswith(("whole image", "centre 80%", "centre 70%"))
        assert all(not m["evidence"] for m in by_path.values() if m["keeper"])
        # the group stage's own verification of the link, as the manifest's link columns hold it
        assert near["link"]["kind"] in ("near", "mirror") and near["link"]["to"] in ("cat/c.jpg", "dog/c.jpg")
        assert 0 < float(near["link"]["likeness"]) <= 1 and float(near["link"]["blemish"]) >= 0
        assert copy["link"]["kind"] == "exact"

    def test_unknown_decisions_are_listed(self, served):
        served.decisions_path.write_text("path,action,value,note\nghost.jpg,drop,,\n")
        served.load()
        assert api(served, "/api/summary")["unknown"] == [
            {"line": 2, "path": "ghost.jpg", "action": "drop", "value": ""}]

    def test_decide_writes_at_once_and_undo_restores(self, served):
        row = row_of(served, "dog/c.jpg")
        r = decide(served, row=row, action="relabel", value="cat", note="same rock pool")
        assert r["previous"] is None
        assert decisions.load(served.decisions_path)["value"].tolist() == ["cat"]
        r = decide(served, row=row, action="relabel", value="eel")
        assert r["previous"]["value"] == "cat"
        decide(served, row=row, action="relabel", value="cat", note="same rock pool")  # the page's undo
        assert served.decisions_path.read_text() == "path,action,value,note\ndog/c.jpg,relabel,cat,same rock pool\n"
        leftovers = [p.name for p in served.folder.iterdir() if p.name.endswith(".tmp")]
        assert leftovers == []
        item = api(served, "/api/items?tab=conflicts")["items"][0]
        member = next(m for m in item["members"] if m["path"] == "dog/c.jpg")
        assert member["decisions"][0]["value"] == "cat"

    def test_page_decisions_equal_hand_written(self, served, tmp_path):
        """The same decisions made through the page's API (then re-run) and written by hand (then
        prepare) give byte-identical manifests."""
        rows = {p: row_of(served, p) for p in ("cat/a.jpg", "cat/b.jpg", "dog/c.jpg", "dog/tiny.jpg",
                                               "cat/d.jpg", "dog/f.jpg", "cat/e.jpg")}
        decide(served, row=rows["cat/b.jpg"], action="separate", other=rows["cat/a.jpg"], note="two shots")
        decide(served, row=rows["dog/c.jpg"], action="relabel", value="cat")
        decide(served, row=rows["dog/tiny.jpg"], action="drop")
        decide(served, row=rows["cat/d.jpg"], action="join", other=rows["dog/f.jpg"])
        decide(served, row=rows["cat/e.jpg"], action="keep", note="fine")
        status, _, data = request(served, "POST", "/api/rerun", body={})
        assert status == 200, data
        assert json.loads(data)["counts"]["conflicts"] == 1  # cat/d joined with dog/f
        by_page = (served.folder / "manifest.csv").read_bytes()

        hand = tmp_path / "hand.csv"
        hand.write_text("path,action,value,note\n"
                        "dog/tiny.jpg,drop,,\n"
                        "cat/e.jpg,keep,,fine\n"
                        "cat/a.jpg,separate,cat/b.jpg,two shots\n"
                        "dog/f.jpg,join,cat/d.jpg,\n"
                        "dog/c.jpg,relabel,cat,\n")
        prepare(served.roots, tmp_path / "by-hand", jobs=1, seed=1, decisions=hand)
        assert (tmp_path / "by-hand" / "manifest.csv").read_bytes() == by_page
        m = manifest.read(tmp_path / "by-hand" / "manifest.csv").set_index("path")
        assert m["dup_group"].isna()[["cat/a.jpg", "cat/b.jpg"]].all()


def test_review_command_prints_the_address(tmp_path, runner, monkeypatch):
    """The command prints the 127.0.0.1 address with its token, opens no browser with
    --no-browser, and stops cleanly on Ctrl-C."""
    from labelprep.reviews import server as server_module

    out = tmp_path / "out"
    prepare(make_tree(tmp_path / "photos"), out, jobs=1)
    opened = []
    monkeypatch.setattr("webbrowser.open", opened.append)

    def interrupted(self, *args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(server_module.ReviewServer, "serve_forever", interrupted)
    result = runner.invoke(main, ["review", str(out), "--no-browser"])
    assert result.exit_code == 0, result.output
    assert "review page: http://127.0.0.1:" in result.output and "?token=" in result.output
    assert opened == []
    result = runner.invoke(main, ["review", str(out)])
    assert len(opened) == 1 and opened[0].startswith("http://127.0.0.1:")
    result = runner.invoke(main, ["review", str(tmp_path)])
    assert result.exit_code == 2 and "holds no manifest.csv" in result.output
