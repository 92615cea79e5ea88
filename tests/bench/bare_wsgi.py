"""The floor of one ingest request under gunicorn, for ``bench_ingest.py --floor``: a WSGI app that reads the
whole request body and answers with an acknowledgement of the size the service sends, and does nothing else."""

from __future__ import annotations

_SINGLE = b'{"seq":1,"status":"created"}'


def _batch_ack(n: int) -> bytes:
    items = b",".join(b'{"seq":%d,"status":"created"}' % (i + 1) for i in range(n))
    return b'{"created":%d,"duplicates":0,"results":[%s]}' % (n, items)


_ACKS: dict[int, bytes] = {}


def app(environ, start_response):
    body = environ["wsgi.input"].read(int(environ.get("CONTENT_LENGTH") or 0))
    n = body.count(b'"seq"')  # reports in the body: the service's answer lists each
    if b'"reports"' in body:
        answer = _ACKS.get(n) or _ACKS.setdefault(n, _batch_ack(n))
    else:
        answer = _SINGLE
    start_response("201 Created", [("Content-Type", "application/json"), ("Content-Length", str(len(answer)))])
    return [answer]
