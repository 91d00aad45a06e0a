"""Fixtures for the integration tests: one real Kafka broker per session.

`kafka_local` starts a broker with deploy/kafka-local in a run dir of its
own under build/ (build/kafka/it-<pid>) on free loopback ports, so it never
meets a broker a user started with `make kafka-up`; it is always stopped
and its data deleted at the end.  A broker that cannot start fails every
test that needs it, with the broker's log in the message: these tests are
never skipped.  `broker` is its bootstrap address; `new_topic` creates
uniquely named topics; `oddsky` starts the daemon and kills what is left
at the end of the test.
"""
import glob
import os
import shutil
import signal
import subprocess
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
import kafka_util  # noqa: E402

_timings = {}


def _reap_stale_brokers():
    """Stop brokers left by an earlier session that was killed before its
    teardown (its run dir is named after its pid, which is gone)."""
    for d in glob.glob(os.path.join(kafka_util.TOP, "build", "kafka", "it-*")):
        try:
            pid = int(d.rsplit("-", 1)[1])
        except ValueError:
            continue
        if pid == os.getpid() or os.path.exists(f"/proc/{pid}"):
            continue
        subprocess.run([kafka_util.KAFKA_LOCAL, "down", "--dir", d],
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, timeout=120)
        shutil.rmtree(d, ignore_errors=True)


@pytest.fixture(scope="session")
def kafka_local(request):
    _reap_stale_brokers()
    run_dir = os.path.join(kafka_util.TOP, "build", "kafka", f"it-{os.getpid()}")
    kl = kafka_util.KafkaLocal(run_dir)
    try:
        try:
            kl.up()
        except Exception as e:  # noqa: BLE001 - any failure is fatal here
            pytest.fail(f"the Kafka broker for the integration tests did not start:\n{e}\n"
                        f"--- broker log tail:\n{kl.log_tail()}", pytrace=False)
        _timings["broker start"] = kl.start_seconds
        yield kl
    finally:
        try:
            kl.down()
        finally:
            # The broker log stays after a failed run (or with
            # ODDSKY_KEEP_KAFKA_LOG set); a clean run leaves nothing behind.
            clean = kl.start_seconds is not None and request.session.testsfailed == 0
            if clean and not os.path.exists(os.path.join(run_dir, "data")):
                log = os.path.join(run_dir, "kafka.log")
                if os.path.exists(log) and os.environ.get("ODDSKY_KEEP_KAFKA_LOG") is None:
                    os.remove(log)
                try:
                    os.rmdir(run_dir)
                except OSError:
                    pass


@pytest.fixture(scope="session")
def broker(kafka_local):
    """Bootstrap address "127.0.0.1:PORT" of the session's broker."""
    return kafka_local.bootstrap


@pytest.fixture
def new_topic(broker):
    """new_topic(partitions=4, prefix="t", config=None) -> name of a freshly
    created, uniquely named topic."""
    def make(partitions=4, prefix="t", config=None):
        return kafka_util.create_topic(broker, kafka_util.unique_name(prefix),
                                       partitions, config=config)
    return make


def pytest_terminal_summary(terminalreporter):
    for name, secs in _timings.items():
        if secs is not None:
            terminalreporter.write_line(f"{name}: {secs:.1f} s")


@pytest.fixture
def oddsky(tmp_path):
    """oddsky(config_dict, args=(), **kw) -> Popen of `oddsky run` in a work
    dir under tmp_path (see kafka_util.start_oddsky); any daemon still
    running at the end of the test is killed."""
    procs = []

    def start(config, args=(), **kw):
        kw.setdefault("workdir", str(tmp_path / f"oddsky-{len(procs)}"))
        proc = kafka_util.start_oddsky(config, args, **kw)
        procs.append(proc)
        return proc
    yield start
    for proc in procs:
        if proc.poll() is None:
            kafka_util.stop_oddsky(proc, signal.SIGKILL, timeout_s=10)
