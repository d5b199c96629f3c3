"""The review server's JSON API, spoken to directly over loopback.

Every server here listens on port 0 (a free port) on 127.0.0.1 and is shut down in a
fixture's ``finally``, so no thread or socket outlives its test. The store is built by
hand (a run, detections, a sample with strata and items, tiny PNG and WAV files), so
these tests do not depend on how samples are drawn or rendered.
"""

from __future__ import annotations

import http.client
import json
import os
import signal
import struct
import subprocess
import sys
import threading
import time
import zlib
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.agreement import cohen_kappa, confusion_proportions
from callsieve.classifier.review_server import ReviewServer, compose_note, make_server, parse_note
from callsieve.classifier.store import Transaction, open_store

CLASSES = ["background", "upsweep-a", "pulse-train"]


# -- a store with a sample, written by hand ---------------------------------------------


def tiny_png(width: int = 8, height: int = 4, seed: int = 0) -> bytes:
    """A valid greyscale PNG written with the standard library (PNG spec, from memory)."""
    rng = np.random.default_rng(seed)
    pixels = rng.integers(0, 256, size=(height, width), dtype=np.uint8)
    raw = b"".join(b"\x00" + row.tobytes() for row in pixels)

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    header = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b"")


def make_review_store(
    root: Path,
    n_items: int = 12,
    double: tuple[int, ...] = (),
    blind: bool = False,
    image_writer=None,
    fast_clips: bool = True,
) -> dict:
    """A store with one run, ``n_items`` detections, and a sample of all of them.

    Parameters
    ----------
    root : Path
        Folder for ``store.db`` and the sample folder ``sample/``.
    n_items : int
        Detections (and sample items), in three strata by confidence.
    double : tuple of int
        Positions (0-based, in draw order) of the items marked for double review.
    blind : bool
        Whether the sample is blind.
    image_writer : callable, optional
        ``image_writer(path, i)`` writes item i's spectrogram PNG (default: a tiny PNG).
    fast_clips : bool
        Also write a ×4 time-compressed clip beside each clip.

    Returns
    -------
    dict
        ``db``, ``folder``, ``sample_id``, ``ids`` (detection ids in draw order).
    """
    db = root / "store.db"
    folder = root / "sample"
    (folder / "images").mkdir(parents=True)
    (folder / "clips").mkdir()
    con = open_store(db)
    ids = []
    with Transaction(con):
        con.execute(
            "INSERT INTO deployments (name, manifest, sample_rate_hz, channel) VALUES ('invented-shelf-01', "
            "'/nowhere/manifest.toml', 2000, 0)"
        )
        con.execute(
            "INSERT INTO files (deployment_id, name, start_utc, duration_s, sample_rate_hz, size_bytes, mtime_ns) "
            "VALUES (1, 'rec_20310504T060000Z.wav', '2031-05-04T06:00:00Z', 3600.0, 2000, 1, 1)"
        )
        con.execute(
            "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, "
            "parameters, versions, host, started_utc, status) VALUES ('k', 1, 'abc', '/nowhere/model.skops', ?, "
            "NULL, 0.1, '{}', '{}', 'test-host', '2031-06-01T00:00:00Z', 'finished')",
            (json.dumps(CLASSES),),
        )
        for i in range(n_items):
            conf = 0.1 + 0.85 * i / max(n_items - 1, 1)
            cur = con.execute(  # confidences rise with draw order, from 0.1 to 0.95
                "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, "
                "received_level_db, snr_db, clipped) VALUES (1, 1, ?, ?, 60.0, 240.0, 'upsweep-a', ?, ?, ?, 0)",
                (100.0 + 30 * i, 101.3 + 30 * i, conf, 112.0 + i, 6.0 + i / 2),
            )
            ids.append(int(cur.lastrowid))
        design = {"strata": "fixed edges", "allocation": "equal", "edges": [0.1, 0.4, 0.7, 1.0]}
        con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, blind, folder, created_utc) VALUES "
            "(1, 'upsweep-a', ?, 11, ?, ?, '2031-06-02T00:00:00Z')",
            (json.dumps(design), int(blind), str(folder)),
        )
        sample_id = int(con.execute("SELECT max(sample_id) FROM review_samples").fetchone()[0])
        edges = design["edges"]
        strata = [
            min(int(np.searchsorted(edges, 0.1 + 0.85 * i / max(n_items - 1, 1), "right")) - 1, 2)
            for i in range(n_items)
        ]
        for h in range(3):
            k = strata.count(h)
            con.execute(
                "INSERT INTO review_strata (sample_id, stratum, low, high, population, sampled) "
                "VALUES (?, ?, ?, ?, ?, ?)",
                (sample_id, h, edges[h], edges[h + 1], 10 * k, k),
            )
        for i, det in enumerate(ids):
            image, clip = f"images/{det:06d}.png", f"clips/{det:06d}.wav"
            if image_writer is None:
                (folder / image).write_bytes(tiny_png(seed=i))
            else:
                image_writer(folder / image, i)
            sf.write(folder / clip, 0.1 * np.sin(2 * np.pi * 440 * np.arange(800) / 8000), 8000)
            if fast_clips:
                sf.write(folder / f"clips/{det:06d}_x4.wav", np.zeros(200), 8000)
            con.execute(
                "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order, "
                "image, clip, double_review) VALUES (?, ?, ?, 0.1, ?, ?, ?, ?)",
                (sample_id, det, strata[i], i, image, clip, int(i in double)),
            )
    con.close()
    return {"db": db, "folder": folder, "sample_id": sample_id, "ids": ids}


@pytest.fixture
def review_store(tmp_path: Path) -> dict:
    return make_review_store(tmp_path, n_items=12, double=(1, 4, 7, 10))


class Running:
    """A review server serving from a thread; ``stop()`` shuts it and joins the thread."""

    def __init__(self, db: Path, **kw) -> None:
        self.log: list[str] = []
        self.server: ReviewServer = make_server(db, host="127.0.0.1", port=0, log=self.log.append, **kw)
        self.port = self.server.port
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05})
        self.thread.start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=5)
        assert not self.thread.is_alive()

    def request(self, method: str, path: str, body=None, headers: dict | None = None) -> tuple[int, dict, bytes]:
        """One request on its own connection; returns status, headers and body."""
        con = http.client.HTTPConnection("127.0.0.1", self.port, timeout=20)
        try:
            hdrs = dict(headers or {})
            data = None
            if body is not None:
                data = body if isinstance(body, bytes) else json.dumps(body).encode()
                hdrs.setdefault("Content-Type", "application/json")
            con.request(method, path, body=data, headers=hdrs)
            resp = con.getresponse()
            return resp.status, dict(resp.getheaders()), resp.read()
        finally:
            con.close()

    def get_json(self, path: str) -> dict:
        status, _, body = self.request("GET", path)
        assert status == 200, body
        return json.loads(body)

    def post_verdict(self, reviewer: str, det: int, verdict: str, **extra) -> tuple[int, dict]:
        status, _, body = self.request(
            "POST", "/api/verdicts", {"reviewer": reviewer, "detection_id": det, "verdict": verdict, **extra}
        )
        return status, json.loads(body)


@pytest.fixture
def server(review_store: dict) -> Iterator[Running]:
    running = Running(review_store["db"])
    try:
        yield running
    finally:
        running.stop()


def stored_verdicts(db: Path) -> list[tuple]:
    con = open_store(db, create=False)
    try:
        return [
            tuple(r) for r in con.execute("SELECT detection_id, reviewer, verdict, note, recorded_utc FROM verdicts")
        ]
    finally:
        con.close()


# -- verdicts -------------------------------------------------------------------------------


def test_verdict_round_trip_is_stored_at_once_with_reviewer_and_utc_time(server, review_store):
    det = review_store["ids"][3]
    status, saved = server.post_verdict("reviewer-a", det, "yes", note="clear upsweep")
    assert status == 200 and saved["replaced"] is False
    # In the store as soon as the reply came (no batching), with an ISO 8601 UTC time.
    rows = stored_verdicts(review_store["db"])
    assert rows == [(det, "reviewer-a", "yes", "clear upsweep", saved["recorded_utc"])]
    assert saved["recorded_utc"].endswith("Z")
    item = server.get_json(f"/api/items/{det}?reviewer=reviewer-a")
    assert item["mine"]["verdict"] == "yes" and item["mine"]["note"] == "clear upsweep"
    assert item["facts"]["file"] == "rec_20310504T060000Z.wav"
    # 06:00:00 plus start_s = 100 + 30 * 3 s (the fixture's detections).
    assert item["facts"]["start_utc"] == "2031-05-04T06:03:10.000Z"
    assert item["facts"]["confidence"] == pytest.approx(0.1 + 0.85 * 3 / 11)
    assert item["image"].startswith("/files/images/") and item["clips"][0]["url"].startswith("/files/clips/")
    assert [c["speed"] for c in item["clips"]] == [1.0, 4.0]


def test_later_verdict_of_a_reviewer_replaces_theirs_and_others_are_kept(server, review_store):
    det = review_store["ids"][0]
    server.post_verdict("reviewer-a", det, "yes")
    server.post_verdict("reviewer-b", det, "no", note="engine noise")
    status, saved = server.post_verdict("reviewer-a", det, "unsure", note="second listen")
    assert status == 200 and saved["replaced"] is True
    rows = sorted(stored_verdicts(review_store["db"]))
    # SPEC §5: one row per (detection, reviewer); the later verdict wins.
    assert [(r[0], r[1], r[2], r[3]) for r in rows] == [
        (det, "reviewer-a", "unsure", "second listen"),
        (det, "reviewer-b", "no", "engine noise"),
    ]


def test_another_call_type_is_kept_in_the_note_and_the_verdict_stays_valid(server, review_store):
    det = review_store["ids"][2]
    status, saved = server.post_verdict("reviewer-a", det, "no", note="  faint\nand short ", call_type="pulse-train")
    assert status == 200
    (row,) = stored_verdicts(review_store["db"])
    assert row[2] == "no" and row[3] == "[type: pulse-train] faint and short"
    assert parse_note(row[3]) == ("faint and short", "pulse-train")
    assert parse_note(compose_note(None, "background")) == ("", "background")
    item = server.get_json(f"/api/items/{det}?reviewer=reviewer-a")
    assert item["mine"]["call_type"] == "pulse-train" and item["mine"]["note"] == "faint and short"


@pytest.mark.parametrize(
    ("body", "status"),
    [
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "maybe"}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "YES"}, 400),
        ({"reviewer": "", "detection_id": 1, "verdict": "yes"}, 400),
        ({"reviewer": "a,b", "detection_id": 1, "verdict": "yes"}, 400),
        ({"reviewer": "<script>", "detection_id": 1, "verdict": "yes"}, 400),
        ({"reviewer": "x" * 65, "detection_id": 1, "verdict": "yes"}, 400),
        ({"reviewer": 7, "detection_id": 1, "verdict": "yes"}, 400),
        ({"reviewer": "reviewer-a", "detection_id": "1", "verdict": "yes"}, 400),
        ({"reviewer": "reviewer-a", "detection_id": True, "verdict": "yes"}, 400),
        ({"reviewer": "reviewer-a", "verdict": "yes"}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "yes", "extra": 1}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "yes", "note": "x" * 2001}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "yes", "note": 5}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 1, "verdict": "yes", "call_type": "whale"}, 400),
        ({"reviewer": "reviewer-a", "detection_id": 99999, "verdict": "yes"}, 404),
        ([1, 2], 400),
    ],
)
def test_bad_verdicts_get_a_4xx_with_a_json_message_and_store_nothing(server, review_store, body, status):
    got, _, raw = server.request("POST", "/api/verdicts", body)
    assert got == status
    assert json.loads(raw)["error"]
    assert stored_verdicts(review_store["db"]) == []
    assert not any("Traceback" in line for line in server.log)


@pytest.mark.parametrize(
    ("method", "path", "body", "headers", "status"),
    [
        ("POST", "/api/verdicts", b"{not json", {"Content-Type": "application/json"}, 400),
        ("POST", "/api/verdicts", b'{"reviewer": "a"}', {"Content-Type": "text/plain"}, 415),
        ("POST", "/api/verdicts", b"x" * 20000, {"Content-Type": "application/json"}, 413),
        ("POST", "/api/verdicts", b"\xff\xfe", {"Content-Type": "application/json"}, 400),
        ("POST", "/api/other", b"{}", {"Content-Type": "application/json"}, 404),
        ("GET", "/api/queue", None, {}, 400),
        ("GET", "/api/queue?reviewer=a%2Cb", None, {}, 400),
        ("GET", "/api/items/abc?reviewer=reviewer-a", None, {}, 400),
        ("GET", "/api/items/99999?reviewer=reviewer-a", None, {}, 404),
        ("GET", "/api/nothing", None, {}, 404),
        ("GET", "/api/session", None, {"Host": "attacker.example:80"}, 403),
        ("PUT", "/api/verdicts", b"{}", {"Content-Type": "application/json"}, 405),
        ("DELETE", "/api/verdicts", None, {}, 405),
        (
            "POST",
            "/api/verdicts",
            b'{"reviewer": "reviewer-a", "detection_id": 1, "verdict": "yes"}',
            {"Content-Type": "application/json", "Origin": "http://attacker.example"},
            403,
        ),
    ],
)
def test_bad_requests_get_a_4xx_with_a_json_message_never_a_traceback(server, method, path, body, headers, status):
    got, hdrs, raw = server.request(method, path, body, headers)
    assert got == status
    assert hdrs["Content-Type"].startswith("application/json")
    assert json.loads(raw)["error"]
    assert b"Traceback" not in raw
    # The log says what was refused, in one line, without a traceback.
    assert len(server.log) == 1 and "Traceback" not in server.log[0] and str(status) in server.log[0]


def test_a_malformed_request_line_gets_a_json_400(server):
    import socket

    with socket.create_connection(("127.0.0.1", server.port), timeout=5) as s:
        s.sendall(b"GARBAGE\r\n\r\n")
        # Headers and body may come in separate segments; HTTP/1.0 closes when done.
        reply = b""
        while chunk := s.recv(4096):
            reply += chunk
    assert reply.startswith(b"HTTP/1.0 400") and b'"error"' in reply


# -- files ----------------------------------------------------------------------------------


def test_an_image_and_a_clip_of_the_sample_are_served_with_ranges(server, review_store):
    det = review_store["ids"][0]
    status, hdrs, body = server.request("GET", f"/files/images/{det:06d}.png")
    assert status == 200 and hdrs["Content-Type"] == "image/png"
    assert body == (review_store["folder"] / f"images/{det:06d}.png").read_bytes()
    clip = (review_store["folder"] / f"clips/{det:06d}.wav").read_bytes()
    # Range requests (RFC 9110 §14): what audio players send to seek and loop.
    status, hdrs, body = server.request("GET", f"/files/clips/{det:06d}.wav", headers={"Range": "bytes=4-11"})
    assert status == 206 and body == clip[4:12] and hdrs["Content-Range"] == f"bytes 4-11/{len(clip)}"
    status, _, body = server.request("GET", f"/files/clips/{det:06d}.wav", headers={"Range": "bytes=-6"})
    assert status == 206 and body == clip[-6:]


@pytest.mark.parametrize(
    "path",
    [
        "/files/../store.db",
        "/files/../../etc/passwd",
        "/files/images/../../store.db",
        "/files/%2e%2e/store.db",
        "/files/%2e%2e%2fstore.db",
        "/files/images%2f%2e%2e%2f%2e%2e%2fsecret.png",
        "/files/%252e%252e%252fsecret.png",
        "/files/%25252e%25252e%25252fsecret.png",
        "/files//etc/passwd",
        "/files/%2fetc%2fpasswd",
        "/files/%2Ftmp%2Fsecret.png",
        "/files/..%5csecret.png",
        "/files/images%5c..%5c..%5csecret.png",
        "/files/C:%2fsecret.png",
        "/files/images/%00.png",
        "/files/./images/x.png",
        "/files/images//x.png",
        "/files/%c0%ae%c0%ae/secret.png",
        "/files/link-out.png",
        "/files/dir-out/secret.png",
        "/files/../sample/../secret.png",
        "/files/store.db",
        "/files/",
    ],
)
def test_no_path_outside_the_sample_folder_is_served(server, review_store, path):
    root = review_store["folder"].parent
    (root / "secret.png").write_bytes(b"SECRET")
    # Symbolic links inside the folder that point out of it (a file and a folder).
    link = review_store["folder"] / "link-out.png"
    if not link.exists():
        link.symlink_to(root / "secret.png")
        (review_store["folder"] / "dir-out").symlink_to(root, target_is_directory=True)
    status, hdrs, body = server.request("GET", path)
    assert 400 <= status < 500
    assert b"SECRET" not in body and b"SQLite" not in body
    assert json.loads(body)["error"]


# -- the reviewer's order, double review and progress ----------------------------------------


def test_each_reviewer_sees_their_unjudged_items_first(server, review_store):
    ids = review_store["ids"]
    for det in ids[:3]:
        server.post_verdict("reviewer-a", det, "yes")
    q = server.get_json("/api/queue?reviewer=reviewer-a")
    order = [i["detection_id"] for i in q["items"]]
    # Open items first in draw order, then the ones already judged.
    assert order[: len(ids) - 3] == ids[3:] and order[-3:] == ids[:3]
    assert [i["status"] for i in q["items"][-3:]] == ["done"] * 3 and q["items"][-1]["verdict"] == "yes"


def test_double_review_items_go_to_two_different_reviewers_and_others_to_one(server, review_store):
    ids = review_store["ids"]
    double = {ids[i] for i in (1, 4, 7, 10)}
    for det in ids:
        server.post_verdict("reviewer-a", det, "yes")
    q_b = server.get_json("/api/queue?reviewer=reviewer-b")
    # Once reviewer-a has judged everything, reviewer-b is offered the double-review items only.
    assert {i["detection_id"] for i in q_b["items"] if i["status"] == "open"} == double
    for det in double:
        server.post_verdict("reviewer-b", det, "no")
    q_c = server.get_json("/api/queue?reviewer=reviewer-c")
    assert q_c["open"] == 0 and q_c["others"] == len(ids)
    progress = server.get_json("/api/progress?reviewer=reviewer-b")
    assert progress["overall"]["complete"] == len(ids)
    assert progress["mine"] == {"judged": 4, "open": 0, "verdicts": {"yes": 0, "no": 4, "unsure": 0}}
    assert sum(s["items"] for s in progress["strata"]) == len(ids)


def test_an_item_open_in_one_reviewers_page_is_not_offered_to_another(server, review_store):
    ids = review_store["ids"]
    single, double = ids[0], ids[1]
    server.get_json(f"/api/items/{single}?reviewer=reviewer-a")
    server.get_json(f"/api/items/{double}?reviewer=reviewer-a")
    status_b = {i["detection_id"]: i["status"] for i in server.get_json("/api/queue?reviewer=reviewer-b")["items"]}
    # A single-review item held by reviewer-a goes to nobody else; a double-review one still may.
    assert status_b[single] == "others" and status_b[double] == "open"


def test_progress_counts_per_stratum_and_per_reviewer(server, review_store):
    ids = review_store["ids"]
    server.post_verdict("reviewer-a", ids[0], "yes")
    server.post_verdict("reviewer-a", ids[11], "no")
    server.post_verdict("reviewer-b", ids[11], "unsure")
    p = server.get_json("/api/progress?reviewer=reviewer-a")
    assert p["overall"]["verdicts"] == {"yes": 1, "no": 1, "unsure": 1}
    assert p["overall"]["started"] == 2 and p["overall"]["complete"] == 2
    assert p["strata"][0]["verdicts"]["yes"] == 1 and p["strata"][-1]["verdicts"] == {"yes": 0, "no": 1, "unsure": 1}
    assert p["reviewers"] == [{"reviewer": "reviewer-a", "verdicts": 2}, {"reviewer": "reviewer-b", "verdicts": 1}]


def test_a_blind_sample_hides_confidence_label_and_stratum(tmp_path):
    store = make_review_store(tmp_path, n_items=6, blind=True)
    running = Running(store["db"])
    try:
        item = running.get_json(f"/api/items/{store['ids'][0]}?reviewer=reviewer-a")
        assert not {"confidence", "label", "stratum", "inclusion_probability"} & set(item["facts"])
        order = [i["detection_id"] for i in running.get_json("/api/queue?reviewer=reviewer-a")["items"]]
        # Shuffled, not in draw (confidence) order, and the same for every reviewer.
        assert sorted(order) == sorted(store["ids"]) and order != store["ids"]
        assert order == [i["detection_id"] for i in running.get_json("/api/queue?reviewer=reviewer-b")["items"]]
    finally:
        running.stop()


def test_the_page_loads_nothing_from_elsewhere(server):
    status, hdrs, body = server.request("GET", "/")
    assert status == 200 and hdrs["Content-Type"].startswith("text/html")
    assert "default-src 'none'" in hdrs["Content-Security-Policy"]
    for path in ("/", "/static/review.js", "/static/review.css"):
        _, _, text = server.request("GET", path)
        assert b"http://" not in text and b"https://" not in text and b"//cdn" not in text


# -- many reviewers at once -------------------------------------------------------------------


def test_concurrent_reviewers_lose_and_cross_no_verdict(tmp_path):
    n_threads, n_items, rounds = 6, 30, 2
    store = make_review_store(tmp_path, n_items=n_items)
    running = Running(store["db"])
    expected: dict[tuple[int, str], tuple[str, str]] = {}
    errors: list[str] = []
    deadline = time.monotonic() + 90

    def reviewer(k: int) -> None:
        name = f"reviewer-{k}"
        rng = np.random.default_rng(k)
        for r in range(rounds):  # the second round replaces the first
            for det in rng.permutation(store["ids"]):
                if time.monotonic() > deadline:
                    errors.append(f"{name}: out of time")
                    return
                verdict = ("yes", "no", "unsure")[(int(det) + k + r) % 3]
                note = f"{name} on {int(det)} round {r}"
                status, saved = running.post_verdict(name, int(det), verdict, note=note)
                if status != 200 or saved["reviewer"] != name or saved["detection_id"] != int(det):
                    errors.append(f"{name}: {status} {saved}")
                    return
                expected[(int(det), name)] = (verdict, note)

    threads = [threading.Thread(target=reviewer, args=(k,)) for k in range(n_threads)]
    t0 = time.monotonic()
    try:
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
        elapsed = time.monotonic() - t0
    finally:
        running.stop()
    assert not any(t.is_alive() for t in threads)
    assert errors == []
    rows = stored_verdicts(store["db"])
    # Every (detection, reviewer) exactly once, holding that reviewer's last verdict and note.
    assert len(rows) == n_threads * n_items == len({(r[0], r[1]) for r in rows})
    assert {(r[0], r[1]): (r[2], r[3]) for r in rows} == expected
    print(f"{n_threads * n_items * rounds} verdicts from {n_threads} threads in {elapsed:.2f} s")


# -- agreement --------------------------------------------------------------------------------


def _two_raters(seed: int, n: int, agree: float) -> tuple[list[str], list[str]]:
    rng = np.random.default_rng(seed)
    cats = np.array(["yes", "no", "unsure"])
    a = rng.choice(cats, n, p=[0.5, 0.4, 0.1])
    b = np.where(rng.random(n) < agree, a, rng.choice(cats, n, p=[0.4, 0.4, 0.2]))
    return list(a), list(b)


@pytest.mark.parametrize(("seed", "n", "agree"), [(0, 30, 0.8), (1, 200, 0.5), (2, 57, 0.95), (3, 400, 0.0)])
def test_kappa_equals_scikit_learn(seed, n, agree):
    from sklearn.metrics import cohen_kappa_score

    a, b = _two_raters(seed, n, agree)
    # Point value: scikit-learn's cohen_kappa_score.
    assert cohen_kappa(a, b).kappa == pytest.approx(cohen_kappa_score(a, b), abs=1e-12)


def test_kappa_standard_error_two_forms_and_bootstrap():
    a, b = _two_raters(5, 400, 0.7)
    r = cohen_kappa(a, b)
    p, _ = confusion_proportions(a, b)
    rows, cols, k, pe = p.sum(1), p.sum(0), r.kappa, r.expected
    # The same variance written with kappa (Fleiss, Cohen & Everitt 1969, eq. 13 rearranged,
    # as in Fleiss, Levin & Paik, Statistical Methods for Rates and Proportions, 3rd ed. §18.1;
    # from memory).
    diag = sum(p[i, i] * (1 - (rows[i] + cols[i]) * (1 - k)) ** 2 for i in range(3))
    off = sum(p[i, j] * (cols[i] + rows[j]) ** 2 for i in range(3) for j in range(3) if i != j)
    var = (diag + (1 - k) ** 2 * off - (k - pe * (1 - k)) ** 2) / (400 * (1 - pe) ** 2)
    assert r.se == pytest.approx(np.sqrt(var), rel=1e-9)
    # The large-sample SE agrees with a bootstrap over items at n = 400 (common practice).
    rng = np.random.default_rng(9)
    aa, bb = np.array(a), np.array(b)
    boot = [cohen_kappa(list(aa[i]), list(bb[i])).kappa for i in rng.integers(0, 400, size=(600, 400))]
    assert r.se == pytest.approx(np.std(boot), rel=0.15)
    assert r.low == pytest.approx(k - 1.959964 * r.se) and r.high == pytest.approx(k + 1.959964 * r.se)


def test_kappa_edge_cases():
    assert cohen_kappa([], []).kappa is None
    # One category throughout: chance agreement 1, kappa undefined (scikit-learn gives nan).
    assert cohen_kappa(["yes"] * 5, ["yes"] * 5).kappa is None
    perfect = cohen_kappa(["yes", "no", "unsure", "no"], ["yes", "no", "unsure", "no"])
    assert perfect.kappa == 1.0 and perfect.se == pytest.approx(0.0, abs=1e-12)
    with pytest.raises(ValueError):
        cohen_kappa(["yes"], ["yes", "no"])


def test_agreement_endpoint_reports_kappa_of_double_reviewed_items(server, review_store):
    from sklearn.metrics import cohen_kappa_score

    ids = review_store["ids"]
    a = ["yes", "no", "yes", "unsure", "no", "yes", "yes", "no", "no", "yes", "unsure", "yes"]
    b = ["yes", "no", "no", "unsure", "no", "yes", "unsure", "no", "yes", "yes", "unsure", "yes"]
    for det, va, vb in zip(ids, a, b, strict=True):
        server.post_verdict("reviewer-a", det, va)
        server.post_verdict("reviewer-b", det, vb)
    got = server.get_json("/api/agreement")
    assert got["overall"]["n"] == len(ids)
    # Point value: scikit-learn's cohen_kappa_score.
    assert got["overall"]["kappa"] == pytest.approx(cohen_kappa_score(a, b))
    assert got["pairs"][0]["reviewers"] == ["reviewer-a", "reviewer-b"]
    assert got["pairs"][0]["kappa"] == pytest.approx(cohen_kappa_score(a, b))
    assert -1 <= got["overall"]["low"] < got["overall"]["kappa"] < got["overall"]["high"] <= 1


# -- the command ------------------------------------------------------------------------------


def _callsieve() -> list[str]:
    return [sys.executable, "-m", "callsieve.classifier.cli"]


@pytest.mark.parametrize("stop", [signal.SIGINT, signal.SIGTERM], ids=["ctrl-c", "sigterm"])
def test_serve_command_prints_the_url_and_stops_cleanly(review_store, stop):
    proc = subprocess.Popen(
        [*_callsieve(), "review", "serve", str(review_store["db"]), "--port", "0", "--reviewer", "reviewer-a"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        url = ""
        deadline = time.monotonic() + 30
        while "review page:" not in url and time.monotonic() < deadline:
            url = proc.stdout.readline()
        assert "http://127.0.0.1:" in url and "?reviewer=reviewer-a" in url
        port = int(url.split("http://127.0.0.1:")[1].split("/")[0])
        con = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
        con.request("GET", "/api/session")
        session = json.loads(con.getresponse().read())
        con.close()
        assert session["default_reviewer"] == "reviewer-a" and session["classes"] == CLASSES
        proc.send_signal(stop)
        out, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0
    assert "stopped" in out and err == ""


def test_serve_command_warns_when_listening_beyond_this_machine(review_store):
    proc = subprocess.Popen(
        [*_callsieve(), "review", "serve", str(review_store["db"]), "--port", "0", "--host", "0.0.0.0"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        line = proc.stderr.readline()
        assert line.startswith("callsieve: warning: listening on 0.0.0.0")
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.communicate(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.communicate()


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--sample", "9"], "no such verification sample"),
        (["--reviewer", "a b"], "--reviewer"),
        (["--port", "70000"], "--port"),
    ],
)
def test_serve_command_refuses_a_wrong_call_in_one_line(review_store, extra, message):
    r = subprocess.run(
        [*_callsieve(), "review", "serve", str(review_store["db"]), *extra],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 2
    assert r.stderr.startswith("callsieve: error:") and message in r.stderr and r.stderr.count("\n") == 1


def test_serve_command_refuses_a_store_without_a_sample(tmp_path):
    open_store(tmp_path / "empty.db").close()
    r = subprocess.run(
        [*_callsieve(), "review", "serve", str(tmp_path / "empty.db")], capture_output=True, text=True, timeout=60
    )
    assert r.returncode == 2 and "no verification sample" in r.stderr


def test_no_request_thread_outlives_the_server(review_store):
    before = {t.ident for t in threading.enumerate()}
    running = Running(review_store["db"])
    try:
        for _ in range(5):
            running.get_json("/api/progress")
    finally:
        running.stop()
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline and {t.ident for t in threading.enumerate()} - before:
        time.sleep(0.05)
    assert {t.ident for t in threading.enumerate()} - before == set()


if os.name != "posix":  # pragma: no cover - the symlink and signal tests assume POSIX
    pytestmark = pytest.mark.skip(reason="POSIX only")


# -- with a sample drawn and rendered by `review sample` --------------------------------------


def test_a_sample_drawn_by_review_sample_is_served_and_its_verdicts_export(tmp_path):
    import csv

    review = pytest.importorskip("callsieve.classifier.review")
    sample_tests = pytest.importorskip("test_review_sample")
    db, _ = sample_tests.make_store(tmp_path, n_det=40, files=2)
    review.draw_sample(db, tmp_path / "sample", label=sample_tests.LABEL, n=6, bins=3, seed=1, double_share=0.5)
    running = Running(db)
    try:
        session = running.get_json("/api/session?reviewer=reviewer-a")
        queue = running.get_json("/api/queue?reviewer=reviewer-a")["items"]
        assert len(queue) == session["items"] > 0
        for entry in queue:
            item = running.get_json(f"/api/items/{entry['detection_id']}?reviewer=reviewer-a")
            status, hdrs, body = running.request("GET", item["image"])
            assert status == 200 and hdrs["Content-Type"] == "image/png" and body[:8] == b"\x89PNG\r\n\x1a\n"
            # The clip and, for these 80-160 Hz calls, a time-compressed one beside it.
            assert len(item["clips"]) == 2 and item["clips"][1]["speed"] > 1
            for clip in item["clips"]:
                status, hdrs, body = running.request("GET", clip["url"])
                assert status == 200 and hdrs["Content-Type"] == "audio/wav" and body[:4] == b"RIFF"
            running.post_verdict("reviewer-a", entry["detection_id"], "no", note="faint", call_type="background")
            if entry["required"] == 2:
                running.post_verdict("reviewer-b", entry["detection_id"], "yes")
    finally:
        running.stop()
    out = tmp_path / "verdicts.csv"
    review.export_verdicts(db, out)
    with open(out, newline="") as fh:
        exported = list(csv.DictReader(fh))
    # The verdict table of docs/formats.md §5: verdicts stay yes/no/unsure, the call type rides in the note.
    mine = [r for r in exported if r["reviewer"] == "reviewer-a"]
    assert len(mine) == len(queue) and {r["verdict"] for r in mine} == {"no"}
    assert {r["note"] for r in mine} == {"[type: background] faint"}
    assert len(exported) == len(queue) + sum(e["required"] == 2 for e in queue)
