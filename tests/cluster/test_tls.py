"""A campaign's scheduler refuses plain-TCP clients and clients with a foreign certificate."""

from __future__ import annotations

import stat

import pytest

from sweepctl.cluster import ensure_certificates, make_security
from tests.campaign.helpers import dask_cluster


@pytest.fixture
def tls_scheduler(tmp_path):
    store = tmp_path / "store"
    store.mkdir()
    f = ensure_certificates(store)
    tls = ["--tls-ca-file", str(f["ca"]), "--tls-cert", str(f["cert"]), "--tls-key", str(f["key"])]
    with dask_cluster(tmp_path / "scheduler.json", tls, workers=1) as address:
        yield store, address


def test_keys_are_private(tmp_path):
    f = ensure_certificates(tmp_path)
    for key in (f["key"], f["dir"] / "ca-key.pem"):
        assert stat.S_IMODE(key.stat().st_mode) == 0o600
    assert stat.S_IMODE(f["dir"].stat().st_mode) == 0o700


def test_tls_refuses_plain_and_foreign_clients(tls_scheduler, tmp_path):
    from distributed import Client

    store, address = tls_scheduler
    assert address.startswith("tls://127.0.0.1:")
    # the campaign's own client connects and runs a task (positive control)
    with Client(address, security=make_security(store), timeout="30s") as c:
        assert c.submit(lambda x: x + 1, 1).result(timeout=60) == 2
    # plain TCP to the TLS port: refused
    plain = address.replace("tls://", "tcp://")
    with pytest.raises((OSError, TimeoutError)):
        Client(plain, timeout="5s")
    # a certificate from another store's CA: refused
    other = tmp_path / "other"
    other.mkdir()
    with pytest.raises((OSError, TimeoutError)):
        Client(address, security=make_security(other), timeout="5s")
