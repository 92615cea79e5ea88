"""gunicorn settings the benchmarks use when ``occfuse serve --workers`` is not available."""

timeout = 60
graceful_timeout = 20
keepalive = 5


def post_worker_init(worker):
    # The app is imported and built by now: freeze its objects out of the garbage collector's scans
    # (fusion.server.tune_gc explains why).
    from fusion.server import tune_gc

    tune_gc()
