"""STARTTLS and implicit TLS with a login, against aiosmtpd, the certificate checked against a test CA."""

from __future__ import annotations

import datetime as dt
import ssl
import subprocess
import warnings

import pytest
from aiosmtpd.smtp import AuthResult
from alarms.helpers import SmtpServer, make_result
from support.fixtures import settings_for

from server.alarms import service
from server.alarms.mailer import run_mailer_once


@pytest.fixture(scope="module")
def cert(tmp_path_factory):
    """A self-signed certificate for 127.0.0.1, made with the openssl command line (once per module)."""
    folder = tmp_path_factory.mktemp("tls")
    key, crt = folder / "key.pem", folder / "cert.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key),
                    "-out", str(crt), "-days", "2", "-subj", "/CN=127.0.0.1",
                    "-addext", "subjectAltName=IP:127.0.0.1"], check=True, capture_output=True)
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ctx.load_cert_chain(crt, key)
    return ctx, crt


def _auth(server, session, envelope, mechanism, auth_data):
    return AuthResult(success=auth_data.login == b"halfwatch" and auth_data.password == b"s3cret")


# aiosmtpd 1.4 does not count implicit TLS as TLS for AUTH; the transport is TLS anyway, so the test
# server lifts that requirement for the "ssl" case and its warning about it is expected.
@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS")
@pytest.mark.parametrize("security", ["starttls", "ssl"])
def test_tls_login_and_delivery(security, cert, tmp_path, feeder, plant, migrated_db):
    ctx, ca_file = cert
    options = {"authenticator": _auth, "auth_required": True}
    options.update({"tls_context": ctx, "require_starttls": True} if security == "starttls"
                   else {"ssl_context": ctx, "auth_require_tls": False})
    server = SmtpServer(**options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # aiosmtpd's own ssl wrapping on 3.11
        server.start()
    try:
        service.create_subscription(migrated_db, {"email": "planner@example.test", "scope": "site",
                                                  "scope_id": plant.site_id}, actor="admin1")
        for v in (0.2, 0.3, 1.5, 1.6):
            feeder.feed(plant.point_id, make_result(half_v=v))
        base = dict(smtp_host="127.0.0.1", smtp_port=server.port, smtp_security=security,
                    smtp_user="halfwatch", smtp_timeout_s=5, mail_backoff_s=0.2)
        # Without the test CA the certificate is refused and the email waits.
        refused = settings_for(tmp_path, smtp_password="s3cret", **base)
        assert run_mailer_once(migrated_db, refused) == 0 and server.messages == []
        # With the CA but the wrong password the login fails and the email still waits.
        later = dt.datetime.now(dt.UTC) + dt.timedelta(minutes=5)
        wrong = settings_for(tmp_path, smtp_password="nope", smtp_ca_file=str(ca_file), **base)
        assert run_mailer_once(migrated_db, wrong, now=later) == 0
        good = settings_for(tmp_path, smtp_password="s3cret", smtp_ca_file=str(ca_file), **base)
        assert run_mailer_once(migrated_db, good, now=later + dt.timedelta(minutes=5)) == 1
        assert len(server.messages) == 1
    finally:
        server.stop()
