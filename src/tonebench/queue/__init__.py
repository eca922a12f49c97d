"""Jobs waiting for a bench (jobs: the queue table and its claims), the worker that runs them one
after another, unattended (worker), and the one-worker-per-SQLite-file lock (worker_lock).

May import run/ and everything below it; never cli/. The run does not know the queue: a cancel
reaches it as the run's own RunCancelled, raised from its progress callback.
"""
