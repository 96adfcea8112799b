"""Where chunks run: in this process, in a local process pool, or on a Dask cluster.

All three offer the same three calls: ``submit(fn, *args)`` -> a future,
``wait_first(futures)`` -> the finished ones, ``shutdown()``. No scheduling
of our own beyond the local pool: a cluster is Dask's job.

Trust: a Dask scheduler runs whatever its clients send (functions and data
travel pickled between the client and the workers), so the cluster is one
trust domain. Use TLS (:func:`dask_security`) and never let a scheduler
listen on a network that untrusted machines reach (docs/batch-runs.md).
"""

from __future__ import annotations

import concurrent.futures as cf
import os

from surfrec.errors import InputError

__all__ = ["SerialExecutor", "LocalPool", "DaskExecutor", "make_executor", "dask_security"]


class SerialExecutor:
    """Chunks computed in this process, one after the other (``--workers 1``)."""

    name = "this process"
    workers = 1

    def __init__(self):
        from surfrec.batch.worker import limit_threads

        limit_threads()

    def submit(self, fn, *args):
        f = cf.Future()
        try:
            f.set_result(fn(*args))
        except BaseException as exc:  # handed to the caller through the future, as a pool would
            f.set_exception(exc)
        return f

    def wait_first(self, futures):
        return [f for f in futures if f.done()]

    def shutdown(self, cancel: bool = False):
        pass


def _thread_env():
    # BLAS and OpenMP read these when numpy loads, which in a spawned worker
    # happens before its initializer runs: so they go into the environment the
    # workers inherit. They stay set here too (this process's libraries have
    # read theirs already). numba's variable is set by each worker itself,
    # before it loads numba (see surfrec.batch.worker.limit_threads).
    from surfrec.batch.worker import THREAD_ENV

    os.environ.update({k: v for k, v in THREAD_ENV.items() if k != "NUMBA_NUM_THREADS"})


class LocalPool:
    """A pool of ``workers`` processes on this machine, one compute thread each.

    Workers are started with "spawn" (a fresh interpreter, not a fork of a
    process whose OpenCV or numba thread pools may already run), all at once,
    and given ``spec`` make the run's set-up as they start (see
    surfrec.batch.worker.worker_init): interpreter start-up, imports, kernel
    loading and set-up then overlap the client's own work (rig check) instead
    of delaying the first chunks.
    """

    def __init__(self, workers: int, spec=None):
        import multiprocessing as mp

        from surfrec.batch.worker import worker_init

        self.workers = int(workers)
        self.name = f"a local pool of {self.workers} worker processes"
        _thread_env()
        self.pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=mp.get_context("spawn"),
                                           initializer=worker_init, initargs=(spec,))
        # The pool starts a process only when a task finds none idle: one
        # empty task per worker starts them all now.
        for _ in range(self.workers):
            self.pool.submit(int)

    def submit(self, fn, *args):
        return self.pool.submit(fn, *args)

    def wait_first(self, futures):
        done, _ = cf.wait(futures, return_when=cf.FIRST_COMPLETED)
        return list(done)

    def shutdown(self, cancel: bool = False):
        self.pool.shutdown(wait=True, cancel_futures=cancel)


class DaskExecutor:
    """Chunks on a Dask distributed cluster (``--scheduler ADDRESS``) or a LocalCluster (``local``).

    Parameters
    ----------
    address : scheduler address ("tls://host:8786", "tcp://..."), or "local".
    workers : workers of a LocalCluster (ignored for an existing cluster).
    security : distributed.Security or None.
    """

    def __init__(self, address: str, *, workers: int, security=None):
        try:
            import distributed
        except ImportError:
            raise InputError("--scheduler needs Dask distributed: pip install 'surfrec[cluster]'") from None
        from surfrec.batch.worker import THREAD_ENV

        self.distributed = distributed
        self.cluster = None
        if address == "local":
            # Loopback only: a LocalCluster serves this run and nobody else.
            kw = {"security": security, "protocol": "tls://"} if security is not None else {}
            self.cluster = distributed.LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                                                    host="127.0.0.1", dashboard_address=None, env=dict(THREAD_ENV),
                                                    **kw)
            address = self.cluster.scheduler_address
            self.name = f"a Dask LocalCluster of {workers} workers on {address}"
        else:
            self.name = f"the Dask cluster at {address}"
        try:
            self.client = distributed.Client(address, security=security, timeout="30s")
        except (OSError, TimeoutError) as exc:
            self._close_cluster()
            raise InputError(f"cannot reach the Dask scheduler at {address} ({exc})") from None
        self.workers = max(1, sum(w.get("nthreads", 1) for w in self.client.scheduler_info()["workers"].values()))

    def submit(self, fn, *args):
        # pure=False: each chunk is a new computation, never a cached one.
        return self.client.submit(fn, *args, pure=False)

    def wait_first(self, futures):
        done, _ = self.distributed.wait(futures, return_when="FIRST_COMPLETED")
        return list(done)

    def shutdown(self, cancel: bool = False):
        try:
            self.client.close()
        finally:
            self._close_cluster()

    def _close_cluster(self):
        if self.cluster is not None:
            self.cluster.close()
            self.cluster = None


def dask_security(path):
    """Dask TLS settings from a small TOML file (certificates on each machine).

    Keys: ``ca_file``, ``cert``, ``key`` (PEM files; relative to the file's
    folder), optional ``require_encryption`` (default true). Returns a
    distributed.Security.
    """
    import tomllib
    from pathlib import Path

    p = Path(path)
    try:
        if p.stat().st_size > 1 << 16:
            raise InputError(f"cluster security file {p} is too large to be one")
        doc = tomllib.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cluster security file {p} cannot be read ({exc.strerror})") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"cluster security file {p} is not valid TOML ({exc})") from None
    allowed = {"ca_file", "cert", "key", "require_encryption"}
    problems = [f"unknown key '{k}'" for k in doc if k not in allowed]
    files = {}
    for k in ("ca_file", "cert", "key"):
        v = doc.get(k)
        if not isinstance(v, str):
            problems.append(f"'{k}' must name a PEM file")
            continue
        f = Path(v) if Path(v).is_absolute() else p.resolve().parent / v
        if not f.is_file():
            problems.append(f"'{k}': {f} does not exist")
        files[k] = str(f)
    req = doc.get("require_encryption", True)
    if not isinstance(req, bool):
        problems.append("'require_encryption' must be true or false")
    if problems:
        raise InputError(f"cluster security file {p}: " + "; ".join(problems))
    try:
        from distributed import Security
    except ImportError:
        raise InputError("--cluster-security needs Dask distributed: pip install 'surfrec[cluster]'") from None
    f = files
    return Security(tls_ca_file=f["ca_file"], tls_client_cert=f["cert"], tls_client_key=f["key"],
                    tls_scheduler_cert=f["cert"], tls_scheduler_key=f["key"], tls_worker_cert=f["cert"],
                    tls_worker_key=f["key"], require_encryption=req)


def make_executor(*, workers: int, scheduler: str | None = None, security=None, spec=None):
    """The executor the options ask for (see the classes); ``spec``: the run a local pool sets up as it starts."""
    if scheduler:
        return DaskExecutor(scheduler, workers=workers, security=security)
    if workers <= 1:
        return SerialExecutor()
    return LocalPool(workers, spec)
