"""The listening server's security and API, over raw HTTP on the loopback interface only.

Every request goes to 127.0.0.1. The server must refuse anything without the session
token (403), serve only the files the manifests list (404 for traversal, absolute
paths, URL-encoded tricks and links leading out of the folder), take marks only by
POST, and never change the WAVs or the manifest.
"""

from __future__ import annotations

import hashlib
import http.client
import json
import os
import shutil
import threading
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from listenkit import make_listen_kit

from pipeline.listen import load_picks
from pipeline.listen.server import ListenServer, _byte_range

OUTSIDE = b"RIFF-outside-the-folder-secret"


@pytest.fixture(scope="module")
def kit(tmp_path_factory):
    k = make_listen_kit(tmp_path_factory.mktemp("listen-server"))
    (k.long.parent / "outside.wav").write_bytes(OUTSIDE)
    return k


@pytest.fixture(scope="module")
def server(kit):
    srv = ListenServer([kit.long, kit.short], bank=kit.bank)
    srv.start()
    yield srv
    srv.stop()


def request(srv, path, *, token=True, method="GET", body=None, headers=None):
    """One raw request to the server (the path is sent exactly as given)."""
    if token:
        path += ("&" if "?" in path else "?") + f"token={srv.token}"
    conn = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=20)
    try:
        conn.request(method, path, body=body, headers=headers or {})
        resp = conn.getresponse()
        return resp.status, dict(resp.getheaders()), resp.read()
    finally:
        conn.close()


def _tree(folder: Path) -> dict[str, str]:
    """SHA-256 of every file the tool must not change (its own picks and cache excluded)."""
    out = {}
    for p in sorted(folder.rglob("*")):
        rel = p.relative_to(folder).as_posix()
        if p.is_file() and rel != "picks.json" and not rel.startswith(".shotsmith-listen"):
            out[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def test_socket_is_bound_to_loopback_only(server):
    host, port = server.httpd.socket.getsockname()
    assert host == "127.0.0.1" and port == server.port > 0
    assert server.url.startswith(f"http://127.0.0.1:{port}/?token=")


@pytest.mark.parametrize("path", ["/", "/api/sounds", "/static/listen.js", "/legend.png",
                                  "/audio/0/generate-0000.wav", "/thumb/0/generate-0000.wav",
                                  "/reference/kick_01", "/api/reference/kick_01", "/nothing"])
def test_every_get_without_the_token_is_403(server, path):
    assert request(server, path, token=False)[0] == 403
    assert request(server, path + "?token=wrong", token=False)[0] == 403
    assert request(server, path + f"?t={server.token}", token=False)[0] == 403
    assert request(server, path + f"?token={server.token[:-1]}", token=False)[0] == 403


def test_a_foreign_host_header_is_403_even_with_the_token(server):
    # DNS rebinding: a page of another site resolved to 127.0.0.1 sends its own Host
    status, _, _ = request(server, "/api/sounds", headers={"Host": f"evil.example:{server.port}"})
    assert status == 403


def test_post_without_the_token_is_403_and_changes_nothing(server, kit):
    body = json.dumps({"folder": 0, "file": "generate-0000.wav", "state": "keep"})
    status, _, _ = request(server, "/api/pick", token=False, method="POST", body=body,
                           headers={"Content-Type": "application/json"})
    assert status == 403
    assert "generate-0000.wav" not in load_picks(kit.long)


@pytest.mark.parametrize("path", [
    "/audio/0/../outside.wav",
    "/audio/0/%2e%2e/outside.wav",
    "/audio/0/%2E%2E%2Foutside.wav",
    "/audio/0/..%2foutside.wav",
    "/audio/0/..%5coutside.wav",
    "/audio/0/%252e%252e%252foutside.wav",
    "/audio/1/../../long/generate-0000.wav",
    "/audio/0/./generate-0000.wav",
    "/audio/0//generate-0000.wav",
    "/audio/0/manifest.json",
    "/audio/0/picks.json",
    "/audio/0/.shotsmith-listen/loudness.json",
    "/audio/0/",
    "/audio/7/generate-0000.wav",
    "/audio/-1/generate-0000.wav",
    "/audio/x/generate-0000.wav",
    "/thumb/0/../outside.wav",
    "/static/../server.py",
    "/static/%2e%2e/server.py",
    "/static/index.html/../../server.py",
    "/reference/..%2f..%2foutside",
    "/reference/kick_01/../../outside",
    "/reference/not-a-clip",
])
def test_traversal_and_unlisted_files_are_404(server, kit, path):
    status, _, body = request(server, path)
    assert status == 404, path
    assert OUTSIDE not in body


def test_absolute_paths_are_404(server, kit):
    outside = kit.long.parent / "outside.wav"
    inside = kit.long / "generate-0000.wav"
    for target in (outside, inside):
        for path in (f"/audio/0/{target}", f"/audio/0/{str(target).replace('/', '%2F')}",
                     f"/audio/0//{target}"):
            status, _, body = request(server, path)
            assert status == 404, path
            assert OUTSIDE not in body


def test_listed_file_is_served_byte_for_byte_with_ranges(server, kit):
    data = (kit.long / "generate-0001.wav").read_bytes()
    status, headers, body = request(server, "/audio/0/generate-0001.wav")
    assert status == 200 and body == data and headers["Content-Type"] == "audio/wav"
    assert headers["X-Content-Type-Options"] == "nosniff"
    assert "default-src 'none'" in headers["Content-Security-Policy"]
    status, headers, body = request(server, "/audio/0/generate-0001.wav",
                                    headers={"Range": "bytes=10-109"})
    assert status == 206 and body == data[10:110]
    assert headers["Content-Range"] == f"bytes 10-109/{len(data)}"
    assert request(server, "/audio/0/generate-0001.wav",
                   headers={"Range": "bytes=-16"})[2] == data[-16:]
    assert request(server, "/audio/0/generate-0001.wav",
                   headers={"Range": f"bytes={len(data)}-"})[0] == 416


def test_byte_range_parsing_follows_rfc_9110():
    # RFC 9110, 14.1.2: first-last inclusive, open end, suffix length; others unsatisfiable
    assert _byte_range("bytes=0-0", 10) == (0, 0)
    assert _byte_range("bytes=3-", 10) == (3, 9)
    assert _byte_range("bytes=5-100", 10) == (5, 9)
    assert _byte_range("bytes=-4", 10) == (6, 9)
    assert _byte_range("bytes=-40", 10) == (0, 9)
    for bad in ("bytes=10-", "bytes=4-2", "bytes=-0", "items=0-1", "bytes=0-1,3-4", "bytes=a-b"):
        assert _byte_range(bad, 10) is None, bad


def test_a_listed_file_that_links_outside_is_left_out(kit, tmp_path):
    folder = tmp_path / "linked"
    shutil.copytree(kit.long, folder)
    secret = tmp_path / "secret.wav"
    secret.write_bytes(OUTSIDE)
    (folder / "generate-0002.wav").unlink()
    os.symlink(secret, folder / "generate-0002.wav")  # still in manifest.json
    srv = ListenServer([folder])
    srv.start()
    try:
        ids = [s["file"] for s in srv.records()["sounds"]]
        assert "generate-0002.wav" not in ids and "generate-0001.wav" in ids
        # load_manifest lists only the regular files present: the link is not an item at all
        from pipeline.manifest import load_manifest

        listed = {it["file"] for it in load_manifest(folder)["items"]}
        assert "generate-0002.wav" not in listed and "generate-0001.wav" in listed
        for path in ("/audio/0/generate-0002.wav", "/thumb/0/generate-0002.wav"):
            status, _, body = request(srv, path)
            assert status == 404 and OUTSIDE not in body
        # a link swapped in while the server runs is refused at request time
        (folder / "generate-0001.wav").unlink()
        os.symlink(secret, folder / "generate-0001.wav")
        status, _, body = request(srv, "/audio/0/generate-0001.wav")
        assert status == 404 and OUTSIDE not in body
        body = json.dumps({"folder": 0, "file": "generate-0001.wav", "state": "keep"})
        assert request(srv, "/api/pick", method="POST", body=body,
                       headers={"Content-Type": "application/json"})[0] == 404
    finally:
        srv.stop()


def test_a_bank_source_that_links_outside_is_404(kit, tmp_path):
    from pipeline.listen.catalog import read_bank

    bank = read_bank(kit.bank)
    assert bank.source_file("kick_01") is not None
    library = tmp_path / "library"
    shutil.copytree(kit.source, library)
    (library / "kick" / "kick_01.wav").unlink()
    os.symlink(kit.long.parent / "outside.wav", library / "kick" / "kick_01.wav")
    moved = type(bank)(bank.path, bank.audio, bank.clips, library.resolve())
    assert moved.source_file("kick_01") is None
    assert moved.source_file("kick_02") is not None


def test_marks_are_posted_and_saved_atomically(server, kit):
    def post(file, state, **headers):
        body = json.dumps({"folder": 0, "file": file, "state": state})
        h = {"Content-Type": "application/json", **headers}
        return request(server, "/api/pick", method="POST", body=body, headers=h)

    status, _, body = post("vary-kick_01-00.wav", "keep")
    assert status == 200 and json.loads(body)["mark"] == "keep"
    assert load_picks(kit.long)["vary-kick_01-00.wav"] == "keep"
    assert post("vary-kick_01-00.wav", "reject")[0] == 200
    assert load_picks(kit.long)["vary-kick_01-00.wav"] == "reject"
    assert post("vary-kick_01-00.wav", None)[0] == 200
    assert "vary-kick_01-00.wav" not in load_picks(kit.long)
    assert post("../outside.wav", "keep")[0] == 404
    assert post("manifest.json", "keep")[0] == 404
    assert post("vary-kick_01-00.wav", "maybe")[0] == 400
    assert post("vary-kick_01-00.wav", "keep", Origin="http://evil.example")[0] == 403
    assert request(server, "/api/pick")[0] == 404  # GET does not change state
    status = request(server, "/api/pick", method="POST", body="folder=0&file=x",
                     headers={"Content-Type": "application/x-www-form-urlencoded"})[0]
    assert status == 415
    big = json.dumps({"folder": 0, "file": "x" * 5000, "state": "keep"})
    assert request(server, "/api/pick", method="POST", body=big,
                   headers={"Content-Type": "application/json"})[0] == 413
    assert not list(kit.long.glob(".picks.json.tmp*"))


def test_concurrent_keeps_both_land_in_a_valid_picks_file(server, kit):
    files = [s["file"] for s in server.records()["sounds"] if s["folder"] == 0]
    for a, b in zip(files[0::2], files[1::2]):
        barrier = threading.Barrier(2)
        codes: list[int] = []

        def keep(name, barrier=barrier, codes=codes):
            body = json.dumps({"folder": 0, "file": name, "state": "keep"})
            barrier.wait()
            codes.append(request(server, "/api/pick", method="POST", body=body,
                                 headers={"Content-Type": "application/json"})[0])

        threads = [threading.Thread(target=keep, args=(n,)) for n in (a, b)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert codes == [200, 200]
        data = json.loads((kit.long / "picks.json").read_text(encoding="utf-8"))
        assert data["picks"][a]["state"] == data["picks"][b]["state"] == "keep"
    assert set(load_picks(kit.long)) >= set(files)


def test_a_session_changes_no_wav_and_no_manifest(kit):
    before = {f: _tree(f) for f in (kit.long, kit.short, kit.source)}
    srv = ListenServer([kit.long, kit.short], bank=kit.bank)
    srv.start()
    try:
        for s in srv.records()["sounds"]:
            assert request(srv, s["audio"])[0] == 200
            assert request(srv, s["thumb"])[0] == 200
        assert request(srv, "/reference/kick_01")[0] == 200
        body = json.dumps({"folder": 1, "file": "short-0.wav", "state": "keep"})
        assert request(srv, "/api/pick", method="POST", body=body,
                       headers={"Content-Type": "application/json"})[0] == 200
    finally:
        srv.stop()
    assert {f: _tree(f) for f in before} == before
    assert (kit.short / "picks.json").is_file()


def test_reference_is_the_clip_the_model_learned_from(server, kit):
    from pipeline.bank import open_bank
    from pipeline.frontend import load_clip

    audio = open_bank(kit.bank).audio
    status, headers, body = request(server, "/reference/kick_01")
    assert status == 200 and headers["Content-Type"] == "audio/wav"
    y, sr = sf.read(__import__("io").BytesIO(body), dtype="float64")
    want = load_clip(kit.source / "kick" / "kick_01.wav", audio)
    assert sr == audio.sample_rate and len(y) == audio.n_samples
    assert np.max(np.abs(y - want)) <= 1.0 / 32768 + 1e-9  # 16-bit rounding only
    info = json.loads(request(server, "/api/reference/kick_01")[2])
    assert info["category"] == "kick" and info["source"] == "kick/kick_01.wav"
    assert info["gain_db"] <= 0.0


def test_without_a_bank_there_are_no_references(kit):
    srv = ListenServer([kit.long])
    srv.start()
    try:
        assert request(srv, "/reference/kick_01")[0] == 404
        assert all(s["nearest"]["reference"] is None for s in srv.records()["sounds"])
        assert all(s["category"] in (None, "hat") for s in srv.records()["sounds"])
    finally:
        srv.stop()


def test_records_describe_each_sound(server):
    data = server.records()
    by_file = {s["file"]: s for s in data["sounds"]}
    copy = by_file["generate-0000.wav"]
    assert copy["nearest"]["near_copy"] and copy["nearest"]["distance_ratio"] == 0.31
    assert not by_file["generate-0001.wav"]["nearest"]["near_copy"]
    assert by_file["generate-0002.wav"]["category"] == "hat"  # asked with --near
    assert by_file["generate-0002.wav"]["category_from"] == "asked with --near"
    assert by_file["vary-kick_01-00.wav"]["category"] == "kick"
    assert by_file["short-0.wav"]["padded"] and not by_file["generate-0000.wav"]["padded"]
    target = data["target_lufs"]
    for s in data["sounds"]:
        assert s["gain_db"] <= 0.0
        if s["lufs"] > target:
            assert s["lufs"] + s["gain_db"] == pytest.approx(target, abs=0.01)
        else:
            assert s["gain_db"] == 0.0


def test_a_folder_without_a_manifest_is_one_clear_error(tmp_path):
    from pipeline.errors import ParameterError, ShotsmithError

    with pytest.raises(ShotsmithError, match="no manifest.json"):
        ListenServer([tmp_path])
    with pytest.raises(ParameterError, match="folder not found"):
        ListenServer([tmp_path / "nope"])


def test_a_manifest_that_is_not_ours_is_one_clear_error(tmp_path):
    from pipeline.errors import OutputError

    (tmp_path / "manifest.json").write_text('{"my": "notes"}')
    with pytest.raises(OutputError, match=r"manifest.json: exists and is not a shotsmith manifest"):
        ListenServer([tmp_path])
    (tmp_path / "manifest.json").write_text('{"tool": ')
    with pytest.raises(OutputError, match=r"manifest.json: unreadable manifest \(not valid JSON\)"):
        ListenServer([tmp_path])


@pytest.mark.slow
@pytest.mark.parametrize("stop", ["SIGINT", "SIGTERM"])
def test_cli_serves_until_stopped_and_says_where_the_picks_are(kit, tmp_path, stop):
    import re
    import signal
    import subprocess
    import sys
    import time

    folder = tmp_path / "long"
    shutil.copytree(kit.long, folder, ignore=shutil.ignore_patterns("picks.json"))
    proc = subprocess.Popen(
        [sys.executable, "-u", "-m", "pipeline", "listen", str(folder), "--no-browser"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        lines = []
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            lines.append(proc.stdout.readline())
            m = re.search(r"http://127\.0\.0\.1:(\d+)/\?token=([\w-]+)", lines[-1])
            if m:
                break
        assert m, lines
        srv = type("S", (), {"port": int(m.group(1)), "token": m.group(2)})
        assert request(srv, "/api/sounds")[0] == 200
        assert request(srv, "/api/sounds", token=False)[0] == 403
        body = json.dumps({"folder": 0, "file": "generate-0001.wav", "state": "keep"})
        assert request(srv, "/api/pick", method="POST", body=body,
                       headers={"Content-Type": "application/json"})[0] == 200
        proc.send_signal(getattr(signal, stop))
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert f"1 kept, 0 rejected; marks in {folder.resolve() / 'picks.json'}" in out
    assert "Traceback" not in err
    assert load_picks(folder) == {"generate-0001.wav": "keep"}


def test_cli_listen_and_export_errors_are_one_line(tmp_path):
    from typer.testing import CliRunner

    from pipeline.cli import app

    result = CliRunner().invoke(app, ["listen", str(tmp_path), "--no-browser"])
    assert result.exit_code == 1
    assert result.output.strip().splitlines() == [
        f"error: {tmp_path.resolve()}: no manifest.json here (not a folder shotsmith wrote)"]
    (tmp_path / "manifest.json").write_text('{"my": "notes"}')
    result = CliRunner().invoke(app, ["export", str(tmp_path), "--out", str(tmp_path / "kit")])
    assert result.exit_code == 1
    assert result.output.strip().splitlines() == [
        f"error: {tmp_path.resolve() / 'manifest.json'}: exists and is not a shotsmith manifest"]
    assert not (tmp_path / "kit").exists()
    assert CliRunner().invoke(app, ["listen", "--no-browser"]).exit_code == 2
