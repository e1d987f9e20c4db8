"""Who, where and when: the session labels of a phantom check (options first, then the maps' sidecars)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from ..errors import InputError
from .history import parse_date

__all__ = ["UNSPECIFIED", "Session", "session_info"]

UNSPECIFIED = "unspecified"


@dataclass
class Session:
    """Date (YYYY-MM-DD), scanner and protocol labels, and where each came from."""

    date: str
    scanner: str
    protocol: str
    sources: dict

    def as_dict(self) -> dict:
        return {"date": self.date, "scanner": self.scanner, "protocol": self.protocol, "sources": self.sources}


def _clean(text) -> str:
    # the history is a CSV keyed on these labels: keep them on one line
    return " ".join(str(text).split())


def session_info(sidecar: dict, *, date: str | None = None, scanner: str | None = None,
                 protocol: str | None = None, today: dt.date | None = None) -> Session:
    """Session labels from the options, else the first map's sidecar, else today / ``unspecified``.

    Sidecar keys used (BIDS / common DICOM-converter output): ``AcquisitionDateTime`` or
    ``AcquisitionDate`` for the date; ``Manufacturer``, ``ManufacturersModelName``,
    ``DeviceSerialNumber`` or ``StationName`` for the scanner; ``ProtocolName`` or
    ``SeriesDescription`` for the protocol.
    """
    sources = {}
    if date is not None:
        d, sources["date"] = parse_date(date).isoformat(), "--date"
    else:
        raw = sidecar.get("AcquisitionDateTime") or sidecar.get("AcquisitionDate")
        if isinstance(raw, str):
            try:
                d, sources["date"] = parse_date(raw).isoformat(), "sidecar"
            except InputError:  # an unparsable sidecar date: fall back to today
                raw = None
        if not isinstance(raw, str):
            d, sources["date"] = (today or dt.date.today()).isoformat(), "today"
    if scanner:
        s, sources["scanner"] = _clean(scanner), "--scanner"
    else:
        fields = [sidecar.get(k) for k in ("Manufacturer", "ManufacturersModelName")]
        fields.append(sidecar.get("DeviceSerialNumber") or sidecar.get("StationName"))
        parts = [_clean(p) for p in fields if isinstance(p, (str, int)) and str(p).strip()]
        s, sources["scanner"] = (" ".join(parts), "sidecar") if parts else (UNSPECIFIED, "none")
    if protocol:
        p, sources["protocol"] = _clean(protocol), "--protocol"
    else:
        raw = sidecar.get("ProtocolName") or sidecar.get("SeriesDescription")
        p, sources["protocol"] = (_clean(raw), "sidecar") if isinstance(raw, str) and raw.strip() else (UNSPECIFIED, "none")
    return Session(d, s, p, sources)
