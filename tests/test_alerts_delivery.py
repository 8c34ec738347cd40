"""Alert delivery against real servers on 127.0.0.1: an aiosmtpd SMTP server and a
``http.server`` webhook receiver, plus the log and command sinks and ``segwatch alerts``.

What is checked: what arrived, how many times, which outbox rows are pending (with
their backoff) or dead, that dead letters become ``op_alert_dead`` lines in the log,
and that the idempotency key of a batch is the same on every retry. The temporary /
permanent split follows RFC 5321 (SMTP 4xx transient, 5xx permanent) and RFC 9110
(HTTP 5xx server errors; 429 from RFC 6585 with ``Retry-After``).
"""

from __future__ import annotations

import http.server
import json
import multiprocessing
import socket
import sqlite3
import sys
import threading
from datetime import datetime, timedelta, timezone
from email import message_from_bytes
from pathlib import Path

import numpy as np
import pytest

aiosmtpd = pytest.importorskip("aiosmtpd.controller", reason="SMTP tests need aiosmtpd (the `test` extra)")

from monitor.delivery import relay as alerts  # noqa: E402
from monitor.delivery.relay import backoff, relay  # noqa: E402
from monitor.delivery.sinks.command import CommandSink  # noqa: E402
from monitor.delivery.sinks.email import EmailAlert, EmailSink, SmtpConfig  # noqa: E402
from monitor.delivery.sinks.log import LogSink  # noqa: E402
from monitor.delivery.sinks.webhook import WebhookSink  # noqa: E402
from monitor.cli import main  # noqa: E402
from monitor.clock import FixedClock  # noqa: E402
from monitor.model import Event  # noqa: E402
from monitor.store.history import History  # noqa: E402
from monitor.store.ledger import RELAY_RESOURCE, Ledger  # noqa: E402
from monitor.periods import parse_period  # noqa: E402

T0 = datetime(2026, 3, 16, 6, 0, tzinfo=timezone.utc)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# ------------------------------------------------------------------ servers


class SmtpHandler:
    """Answers per ``mode``: accept, 451 (try later), 550 (no such user), drop (close the connection)."""

    def __init__(self):
        self.mode = "accept"
        self.refuse: set[str] = set()
        self.received: list[tuple[list[str], bytes]] = []
        self.attempts = 0

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        if address in self.refuse or self.mode == "550":
            return "550 5.1.1 no such user"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        self.attempts += 1
        if self.mode == "451":
            return "451 4.3.0 mailbox busy, try later"
        if self.mode == "drop":
            server.transport.close()
            return "250 OK"
        self.received.append((list(envelope.rcpt_tos), envelope.content))
        return "250 OK"


@pytest.fixture()
def smtp():
    from aiosmtpd.controller import Controller

    handler = SmtpHandler()
    port = _free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)  # not ::1, its default
    controller.start()
    handler.port = port
    yield handler
    controller.stop()


class Hook(http.server.BaseHTTPRequestHandler):
    def do_POST(self):  # noqa: N802 - http.server's naming
        srv = self.server
        body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
        srv.requests.append({"headers": dict(self.headers), "body": json.loads(body), "path": self.path})
        status = srv.answers.pop(0) if srv.answers else 200
        if status == "drop":
            self.close_connection = True
            self.connection.shutdown(socket.SHUT_RDWR)
            return
        self.send_response(status)
        if status == 429:
            self.send_header("Retry-After", "600")
        if status == 302:
            self.send_header("Location", "http://127.0.0.1:9/elsewhere")
        self.send_header("Content-Length", "2")
        self.end_headers()
        self.wfile.write(b"ok")

    def log_message(self, *args):
        pass


@pytest.fixture()
def hook():
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Hook)
    server.requests, server.answers = [], []
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    server.url = f"http://127.0.0.1:{server.server_address[1]}/hooks/s3cret"
    yield server
    server.shutdown()
    server.server_close()


# ------------------------------------------------------------------ a history with events


EVENTS = [Event("emerged", "dwell", None, "dwell differs between hubs."),
          Event("emerged", "dwell", "C", "C stands above the rest on dwell.")]


@pytest.fixture()
def history(tmp_path):
    h = History(f"sqlite:///{tmp_path / 'h.sqlite'}", "hubs")
    yield h
    h.dispose()


def _seed(history: History, sinks, period="2026-W11", events=EVENTS):
    history.store_period(parse_period("week", period, "UTC"), [], events, [s.channel for s in sinks],
                         computed_at=T0, fingerprint="f", rows=9, null_segment_rows=0, segments=["A", "B", "C"])


def _status(history: History) -> dict[str, list[tuple[str, int]]]:
    out: dict[str, list] = {}
    for r in history.alerts(("pending", "sent", "dead")):
        out.setdefault(r.channel, []).append((r.status, r.attempts))
    return out


def _email(port: int, to=("ops@example.com",), **smtp) -> list[EmailSink]:
    cfg = EmailAlert(tuple(to), "segwatch@example.com", SmtpConfig("127.0.0.1", port, timeout=5, **smtp))
    return [EmailSink(cfg, addr) for addr in to]


# ------------------------------------------------------------------ email


def test_email_digest_is_delivered_once_with_text_and_html(history, smtp):
    sinks = _email(smtp.port)
    _seed(history, sinks)
    clock = FixedClock(T0)
    assert relay(history, sinks, clock).sent == 2
    assert relay(history, sinks, clock).sent == 0
    assert len(smtp.received) == 1  # one digest for the period, not one mail per event
    rcpt, raw = smtp.received[0]
    msg = message_from_bytes(raw)
    assert rcpt == ["ops@example.com"] and msg["To"] == "ops@example.com"
    assert msg["Subject"] == "[segwatch] hubs 2026-W11: dwell now differs (+1 more)"
    parts = {p.get_content_type(): p.get_payload(decode=True).decode() for p in msg.walk() if not p.is_multipart()}
    assert set(parts) == {"text/plain", "text/html"}
    assert "C stands above the rest on dwell." in parts["text/plain"]
    assert "<b>emerged</b>" in parts["text/html"]
    assert _status(history) == {"email:ops@example.com": [("sent", 1), ("sent", 1)]}


def test_email_451_is_retried_after_backoff_and_sent_once(history, smtp):
    sinks = _email(smtp.port)
    _seed(history, sinks)
    clock = FixedClock(T0)
    smtp.mode = "451"
    out = relay(history, sinks, clock)
    assert (out.sent, out.retrying, out.dead) == (0, 2, 0)
    row = history.alerts()[0]
    assert row.status == "pending" and row.attempts == 1 and "451" in row.last_error
    assert row.next_attempt_at == T0 + timedelta(seconds=60)  # first backoff step
    smtp.mode = "accept"
    assert relay(history, sinks, clock).sent == 0  # still backing off: the server is not even asked
    assert smtp.attempts == 1
    clock.advance(timedelta(seconds=60))
    assert relay(history, sinks, clock).sent == 2
    assert len(smtp.received) == 1 and smtp.attempts == 2
    assert _status(history) == {"email:ops@example.com": [("sent", 2), ("sent", 2)]}


def test_email_dropped_connection_is_temporary(history, smtp):
    sinks = _email(smtp.port)
    _seed(history, sinks)
    smtp.mode = "drop"
    out = relay(history, sinks, FixedClock(T0))
    assert out.retrying == 2 and out.dead == 0
    assert "closed the connection" in history.alerts()[0].last_error


def test_email_550_is_dead_lettered_logged_and_listed(history, smtp, tmp_path, caplog):
    log_path = tmp_path / "alerts.jsonl"
    sinks = [LogSink(log_path), *_email(smtp.port)]
    _seed(history, sinks)
    smtp.mode = "550"
    out = relay(history, sinks, FixedClock(T0))
    assert (out.sent, out.dead) == (3, 2)  # two events and then the dead letter's op line to the log
    assert _status(history)["email:ops@example.com"] == [("dead", 1), ("dead", 1)]
    dead = [r for r in history.alerts() if r.status == "dead"]
    assert dead[0].last_error.startswith("SMTP 127.0.0.1:") and "550 5.1.1 no such user" in dead[0].last_error
    assert any(r.levelname == "ERROR" and "dead-lettered" in r.getMessage() for r in caplog.records)
    lines = [json.loads(x) for x in log_path.read_text().splitlines()]
    assert [x["kind"] for x in lines] == ["emerged", "emerged", "op_alert_dead"]
    assert lines[2]["message"].startswith("Alert to email:ops@example.com for period 2026-W11 (2 events) "
                                          "failed permanently: SMTP 127.0.0.1:")
    assert relay(history, sinks, FixedClock(T0)).dead == 0  # dead stays dead until --retry
    assert smtp.attempts == 0  # refused at RCPT: no DATA ever


def test_refused_recipient_fails_alone(history, smtp):
    sinks = _email(smtp.port, to=("ops@example.com", "gone@example.com"))
    _seed(history, sinks)
    smtp.refuse = {"gone@example.com"}
    out = relay(history, sinks, FixedClock(T0))
    assert (out.sent, out.dead) == (2, 2)
    assert _status(history) == {"email:gone@example.com": [("dead", 1), ("dead", 1)],
                                "email:ops@example.com": [("sent", 1), ("sent", 1)]}
    assert [rcpt for rcpt, _ in smtp.received] == [["ops@example.com"]]
    assert message_from_bytes(smtp.received[0][1])["To"] == "ops@example.com, gone@example.com"


def test_temporary_failures_give_up_after_the_limit(history, smtp, monkeypatch):
    monkeypatch.setattr(alerts, "MAX_ATTEMPTS", 3)
    sinks = _email(smtp.port)
    _seed(history, sinks)
    smtp.mode = "451"
    clock = FixedClock(T0)
    states = []
    for _ in range(3):
        out = relay(history, sinks, clock, force=True)
        states.append((out.retrying, out.dead))
    assert states == [(2, 0), (2, 0), (0, 2)]
    assert history.alerts()[0].last_error.startswith("gave up after 3 attempts: SMTP")


def test_backoff_doubles_and_honours_retry_after():
    assert [backoff(n).total_seconds() for n in (1, 2, 3, 9, 10, 30)] == [60, 120, 240, 15360, 6 * 3600, 6 * 3600]
    assert backoff(1, retry_after=600).total_seconds() == 600
    assert backoff(5, retry_after=1).total_seconds() == 960


# ------------------------------------------------------------------ webhook


def test_webhook_200_delivers_one_post_with_idempotency_key(history, hook):
    sinks = [WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks)
    assert relay(history, sinks, FixedClock(T0)).sent == 2
    assert len(hook.requests) == 1
    req = hook.requests[0]
    assert req["body"]["job"] == "hubs" and req["body"]["period"] == "2026-W11"
    assert [e["segment"] for e in req["body"]["events"]] == [None, "C"]
    assert len(req["headers"]["Idempotency-Key"]) == 40


def test_webhook_503_then_200_keeps_the_idempotency_key(history, hook):
    sinks = [WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks)
    hook.answers = [503]
    clock = FixedClock(T0)
    assert relay(history, sinks, clock).retrying == 2
    assert "answered HTTP 503" in history.alerts()[0].last_error
    assert "s3cret" not in history.alerts()[0].last_error  # the URL's path is kept out of messages
    clock.advance(timedelta(minutes=1))
    assert relay(history, sinks, clock).sent == 2
    keys = [r["headers"]["Idempotency-Key"] for r in hook.requests]
    assert len(keys) == 2 and keys[0] == keys[1]


def test_webhook_429_waits_as_long_as_asked(history, hook):
    sinks = [WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks)
    hook.answers = [429]
    assert relay(history, sinks, FixedClock(T0)).retrying == 2
    assert history.alerts()[0].next_attempt_at == T0 + timedelta(seconds=600)  # Retry-After: 600


def test_webhook_400_and_redirect_are_permanent(history, hook, tmp_path):
    log_path = tmp_path / "a.jsonl"
    sinks = [WebhookSink(hook.url, timeout=5), LogSink(log_path)]
    _seed(history, sinks, "2026-W10", EVENTS[:1])
    _seed(history, sinks, "2026-W11", EVENTS[1:])
    hook.answers = [400, 302]
    out = relay(history, sinks, FixedClock(T0))
    assert (out.sent, out.dead) == (4, 2)  # the log got both events and both dead letters
    assert len(hook.requests) == 2  # the redirect was not followed
    errors = [r.last_error for r in history.alerts() if r.status == "dead"]
    assert errors[0].endswith("answered HTTP 400 Bad Request")
    assert "answered HTTP 302 (redirect to http://127.0.0.1:9/elsewhere); configure the final URL" in errors[1]
    ops = [json.loads(x) for x in log_path.read_text().splitlines() if '"op_alert_dead"' in x]
    assert [o["period"] for o in ops] == ["2026-W10", "2026-W11"]


def test_webhook_unreachable_and_dropped_are_temporary(history, hook):
    closed = f"http://127.0.0.1:{_free_port()}/x"
    sinks = [WebhookSink(closed, timeout=2), WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks)
    hook.answers = ["drop"]
    out = relay(history, sinks, FixedClock(T0))
    assert (out.retrying, out.dead) == (4, 0)
    errors = {r.channel: r.last_error for r in history.alerts()}
    assert "unreachable" in errors[sinks[0].channel]
    assert "failed: RemoteDisconnected" in errors[sinks[1].channel]


def test_later_periods_wait_for_an_earlier_one(history, hook):
    sinks = [WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks, "2026-W10", EVENTS[:1])
    _seed(history, sinks, "2026-W11", EVENTS[1:])
    hook.answers = [503]
    out = relay(history, sinks, FixedClock(T0))
    assert (out.sent, out.retrying) == (0, 1) and len(hook.requests) == 1
    assert [r["body"]["period"] for r in hook.requests] == ["2026-W10"]


# ------------------------------------------------------------------ command and log sinks


def test_command_sink_states(history, tmp_path):
    out_file = tmp_path / "got.json"
    ok = CommandSink([sys.executable, "-c", f"import sys; open({str(out_file)!r}, 'w').write(sys.stdin.read())"])
    failing = CommandSink([sys.executable, "-c", "import sys; print('quota exceeded', file=sys.stderr); sys.exit(3)"])
    missing = CommandSink([str(tmp_path / "no-such-program")])
    sinks = [ok, failing, missing]
    _seed(history, sinks)
    out = relay(history, sinks, FixedClock(T0))
    assert (out.sent, out.retrying, out.dead) == (2, 2, 2)
    assert [e["kind"] for e in json.loads(out_file.read_text())["events"]] == ["emerged", "emerged"]
    errors = {r.channel: (r.status, r.last_error) for r in history.alerts()}
    assert errors[failing.channel] == ("pending", f"alert command {sys.executable!r} exited with 3: quota exceeded")
    assert errors[missing.channel] == ("dead", f"alert command {str(tmp_path / 'no-such-program')!r} not found")


def test_log_sink_skips_lines_it_already_holds(tmp_path):
    sink = LogSink(tmp_path / "a.jsonl")
    ev = [{"event_key": f"{i:032x}", "job": "j", "period": "2026-W11", "kind": "emerged", "metric": "m",
           "segment": None, "message": "x", "detected_at": "2026-03-16T06:00:00Z"} for i in range(3)]
    sink.send("j", "2026-W11", ev[:2])
    sink.send("j", "2026-W11", ev)  # a retry after a crash between writing and marking
    keys = [json.loads(x)["event_key"] for x in (tmp_path / "a.jsonl").read_text().splitlines()]
    assert keys == [e["event_key"] for e in ev]


def _write_many(path: str, start: int) -> None:
    sink = LogSink(Path(path))
    for i in range(start, start + 40):
        sink.send("j", "p", [{"event_key": f"{i:032x}", "job": "j", "period": "p", "kind": "emerged",
                              "metric": "m" * 500, "segment": None, "message": "y" * 2000,
                              "detected_at": "2026-03-16T06:00:00Z"}])


def test_log_sink_lines_stay_whole_under_two_writers(tmp_path):
    path = str(tmp_path / "shared.jsonl")
    ctx = multiprocessing.get_context("fork")
    procs = [ctx.Process(target=_write_many, args=(path, n * 1000)) for n in range(3)]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
    assert [p.exitcode for p in procs] == [0, 0, 0]
    lines = Path(path).read_text().splitlines()
    assert len(lines) == 120 and len({json.loads(x)["event_key"] for x in lines}) == 120


def test_relay_leaves_alerts_to_the_process_already_delivering(history, hook):
    sinks = [WebhookSink(hook.url, timeout=5)]
    _seed(history, sinks)
    clock = FixedClock(T0)
    other = Ledger(history, clock).claim(RELAY_RESOURCE)
    out = relay(history, sinks, clock)
    assert out.busy == other.owner and out.sent == 0 and hook.requests == []
    Ledger(history, clock).release(other)
    assert relay(history, sinks, clock).sent == 2


# ------------------------------------------------------------------ segwatch alerts


def _project(root: Path, hook_url: str) -> Path:
    rng = np.random.default_rng(3)
    con = sqlite3.connect(root / "src.sqlite")
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", [
        ((datetime(2026, 3, 9) + timedelta(minutes=int(rng.integers(0, 10000)))).strftime("%Y-%m-%d %H:%M:%S"),
         hub, float(rng.normal(30 if hub == "C" else 20, 2)))
        for hub in "ABC" for _ in range(25)])
    con.commit()
    con.close()
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
        "  segment_column: hub\nperiod: week\ntimezone: UTC\nmetrics:\n  - column: dwell\n    test: kruskal\n"
        "history: {url: 'sqlite:///h.sqlite'}\n"
        f"alerts:\n  - type: log\n    path: alerts.jsonl\n  - type: webhook\n    url: {hook_url}\n    timeout: 5\n")
    return cfg


def test_alerts_command_lists_and_retries(tmp_path, hook, capsys):
    cfg = _project(tmp_path, hook.url)
    hook.answers = [400]
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    capsys.readouterr()
    assert main(["alerts", str(cfg)]) == 0
    text = capsys.readouterr().out
    assert text.startswith("hubs: 0 pending, ")
    assert "webhook:http://127.0.0.1:" in text and "/..." in text and "s3cret" not in text
    assert "answered HTTP 400 Bad Request" in text
    assert main(["alerts", str(cfg), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["job"] == "hubs" and doc["periods"] == []
    dead = [a for a in doc["alerts"] if a["status"] == "dead"]
    assert dead and {a["period"] for a in dead} == {"2026-W11"} and all(a["attempts"] == 1 for a in dead)
    # the receiver is fixed: --retry sends everything now and the list is empty
    posts_before = len(hook.requests)
    assert main(["alerts", str(cfg), "--retry"]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"retry: {len(dead)} sent, 0 still failing, 0 dead\n")
    assert "No pending or dead alerts for job hubs." in out
    assert len(hook.requests) == posts_before + 1
    # the op line about the dead letter is in the alert log, once
    ops = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text().splitlines() if '"op_' in x]
    assert [o["kind"] for o in ops] == ["op_alert_dead"]


def test_alerts_retry_that_fails_again_exits_1(tmp_path, hook, capsys):
    cfg = _project(tmp_path, hook.url)
    hook.answers = [503, 503]
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    capsys.readouterr()
    assert main(["alerts", str(cfg), "--retry", "--json"]) == 1
    doc = json.loads(capsys.readouterr().out)
    assert doc["retry"]["retrying"] > 0 and doc["retry"]["sent"] == 0
    assert {a["status"] for a in doc["alerts"]} == {"pending"}
    assert all(a["last_error"].endswith("answered HTTP 503 Service Unavailable") for a in doc["alerts"])


def test_email_digest_attaches_the_report_when_asked(tmp_path, smtp, capsys):
    cfg = _project(tmp_path, "http://127.0.0.1:9/unused")
    text = cfg.read_text()
    text = text[:text.index("alerts:")] + (
        f"alerts:\n  - type: email\n    to: [ops@example.com]\n    from: segwatch@example.com\n"
        f"    smtp: {{host: 127.0.0.1, port: {smtp.port}, timeout: 5}}\n"
        "report: {attach: true, periods: 4}\n")
    cfg.write_text(text)
    from monitor.cli import main

    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    assert len(smtp.received) == 1
    msg = message_from_bytes(smtp.received[0][1])
    files = {p.get_filename(): p.get_payload(decode=True).decode() for p in msg.walk() if p.get_filename()}
    assert list(files) == ["hubs-2026-W11.html"]
    html = files["hubs-2026-W11.html"]
    assert html.startswith("<!DOCTYPE html>") and "dwell" in html and "2026-W11" in html
