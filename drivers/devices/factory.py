"""Open a radio device: a pyadi-iio object, or the emulated radio, by one ``backend`` key.

Both the receive side (``driver.radio``) and the transmit side (``tx.radio``) call
:func:`open_device` with their section's ``backend``, ``device``, ``uri`` and ``emulated``
settings, and then use the returned object the pyadi-iio way (attributes, ``rx()``, ``tx()``,
``tx_destroy_buffer()``). pyadi-iio is optional: it is imported here, when a real device is
asked for, and a missing library is one line with the install hint.

RF caution: a real device opened here can transmit. Operate only within your licence or the
band's licence-exempt rules (frequency, power, emission mask), put enough attenuation between
cabled TX and RX ports, keep clear of antennas for RF exposure; local regulations and licensed
practice take precedence.
"""

from __future__ import annotations

import importlib
from typing import Any, Mapping

from brimline.daemon.errors import BrimlineError
from brimline.drivers.devices.emulated import EmulatedRadio

__all__ = ["open_device", "load_adi", "INSTALL_HINT", "BACKENDS"]

INSTALL_HINT = "install with pip install 'brimline[sdr]'"
#: Device backends: ``iio`` (pyadi-iio) and ``emulated`` (the emulated radio).
BACKENDS = ("iio", "emulated")


def load_adi(*, where: str, error: type[BrimlineError]):
    """Import pyadi-iio (``adi``); a missing library raises ``error`` naming ``where``."""
    try:
        return importlib.import_module("adi")
    except ImportError as exc:
        raise error(f"{where} needs pyadi-iio ({exc}); {INSTALL_HINT}") from exc


def open_device(*, backend: str = "iio", device: str = "Pluto", uri: str = "ip:192.168.2.1",
                emulated: Mapping[str, Any] | None = None, where: str = "radio",
                error: type[BrimlineError] = BrimlineError) -> Any:
    """Open one transceiver.

    Parameters
    ----------
    backend : {"iio", "emulated"}
        ``iio``: the pyadi-iio class ``device`` at ``uri``; ``emulated``: an
        :class:`~brimline.drivers.devices.emulated.EmulatedRadio` with ``emulated`` settings.
    device : str
        pyadi-iio class name (``Pluto``, ...).
    uri : str
        libiio context URI.
    emulated : mapping or None
        Keyword arguments of :class:`EmulatedRadio` (the ``emulated:`` subsection).
    where : str
        Config key path for messages (``driver.radio``, ``tx.radio``).
    error : type
        The :class:`BrimlineError` subclass to raise (``SourceError`` or ``SinkError``).

    Returns
    -------
    object
        The device object.

    Raises
    ------
    error
        For a missing library, an unknown class or a device that cannot be opened (the
        message names the URI).
    """
    if backend == "emulated":
        try:
            return EmulatedRadio(uri=uri, **dict(emulated or {}))
        except (OSError, ValueError) as exc:
            raise error(f"{where}.uri={uri}: emulated radio: {exc}") from exc
    if backend != "iio":
        raise error(f"{where}.backend={backend!r} must be one of {list(BACKENDS)}")
    adi = load_adi(where=where, error=error)
    cls = getattr(adi, device, None)
    if cls is None:
        raise error(f"{where}.device={device!r} is not a pyadi-iio class")
    try:
        return cls(uri=uri)
    except (OSError, RuntimeError, ValueError, AttributeError) as exc:
        raise error(f"{where}.uri={uri}: {type(exc).__name__}: {exc}") from exc
