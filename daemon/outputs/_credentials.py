"""MQTT credentials: the password (secret, file or systemd credential) and the TLS context.

Problems become a :class:`ConfigError` naming the key, raised when the publisher is built — not at
the first connect attempt.
"""

from __future__ import annotations

import ssl
from typing import TYPE_CHECKING

from ionwarden.daemon.errors import ConfigError

if TYPE_CHECKING:
    from ionwarden.daemon.config import MqttSettings

__all__ = ["resolve_password", "tls_context"]


def resolve_password(settings: MqttSettings) -> str | None:
    """The password from ``password`` (env or systemd credential) or ``password_file``."""
    if settings.password is not None and settings.password_file is not None:
        raise ConfigError("mqtt.password_file", "set either password or password_file, not both")
    if settings.password is not None:
        return settings.password.get_secret_value()
    if settings.password_file is not None:
        try:
            text = settings.password_file.read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigError("mqtt.password_file", f"cannot read: {exc.strerror}") from exc
        return text.splitlines()[0] if text else ""
    return None


def tls_context(settings: MqttSettings) -> ssl.SSLContext | None:
    """A verifying client TLS context (CA file or system store, optional client certificate), or
    None when TLS is not configured."""
    if not (settings.tls or settings.tls_ca_file or settings.tls_cert_file):
        return None
    key = "mqtt.tls_ca_file"
    try:
        ctx = ssl.create_default_context(
            cafile=str(settings.tls_ca_file) if settings.tls_ca_file else None
        )
        if settings.tls_cert_file is not None and settings.tls_key_file is not None:
            key = "mqtt.tls_cert_file"
            ctx.load_cert_chain(str(settings.tls_cert_file), str(settings.tls_key_file))
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError(key, f"cannot load TLS material: {exc}") from exc
    return ctx
