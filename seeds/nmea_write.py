"""Writing NMEA 0183 text from arrays of epochs (GGA, optionally GSA and RMC per epoch).

Used by the demo scenario generator and by the round-trip tests of the reader. Every field
is built as a fixed-width byte matrix (one row per epoch, NUL bytes as padding), the
sentences of an epoch are laid side by side, and the NUL padding is dropped at the end, so
no Python loop runs per epoch. NUL bytes are neutral for the XOR checksum, which is
therefore a single reduction over each row.

Field precision (the usual one of current receivers): time ``hhmmss.ss``, latitude
``ddmm.mmmmm``, longitude ``dddmm.mmmmm`` (1e-5 minute, about 2 cm), altitude and geoid
separation 0.1 m, DOPs 0.01.
"""

from __future__ import annotations

import numpy as np

US_PER_DAY = 86_400_000_000
_POW10 = 10 ** np.arange(19, dtype=np.int64)


def _digits(values: np.ndarray, width: int) -> np.ndarray:
    """(n, width) matrix of ASCII decimal digits of non-negative integers, zero padded."""
    v = np.asarray(values, dtype=np.int64)[:, None]
    p = _POW10[width - 1::-1][None, :]
    return ((v // p) % 10 + 48).astype(np.uint8)


def _number(scaled: np.ndarray, decimals: int, int_width: int, *, zero_pad: bool = False,
            signed: bool = False, null: np.ndarray | None = None) -> np.ndarray:
    """Fixed-point text of integers ``scaled`` (value * 10**decimals) as a NUL-padded matrix.

    ``int_width`` is the widest integer part; leading zeros of the integer part become NUL
    padding (kept as '0' with ``zero_pad``), one integer digit is always kept. A '-' goes
    just before the first integer digit for negative values when ``signed``. Rows where
    ``null`` is true are all NUL (an empty field).
    """
    scaled = np.asarray(scaled, dtype=np.int64)
    n = scaled.shape[0]
    mag = np.abs(scaled)
    ipart = _digits(mag // _POW10[decimals], int_width)
    if not zero_pad:
        # number of significant integer digits (at least one)
        ival = mag // _POW10[decimals]
        nd = np.ones(n, dtype=np.int64)
        for k in range(1, int_width):
            nd += ival >= _POW10[k]
        col = np.arange(int_width)[None, :]
        lead = col < (int_width - nd)[:, None]
        ipart[lead] = 0
    else:
        nd = np.full(n, int_width, dtype=np.int64)
    parts = []
    if signed:
        sign = np.zeros((n, int_width + 1), dtype=np.uint8)
        sign[:, 1:] = ipart
        neg = scaled < 0
        rows = np.flatnonzero(neg)
        sign[rows, int_width - nd[rows]] = ord("-")
        parts.append(sign)
    else:
        parts.append(ipart)
    if decimals:
        parts.append(np.full((n, 1), ord("."), dtype=np.uint8))
        parts.append(_digits(mag % _POW10[decimals], decimals))
    out = np.hstack(parts)
    if null is not None and null.any():
        out[null] = 0
    return out


def _const(n: int, text: bytes) -> np.ndarray:
    return np.tile(np.frombuffer(text, dtype=np.uint8), (n, 1))


def _choice(mask: np.ndarray, yes: bytes, no: bytes) -> np.ndarray:
    return np.where(mask[:, None], np.frombuffer(yes, np.uint8)[None, :],
                    np.frombuffer(no, np.uint8)[None, :]).astype(np.uint8)


def _round_scaled(values: np.ndarray, decimals: int) -> tuple[np.ndarray, np.ndarray]:
    v = np.asarray(values, dtype=np.float64)
    null = ~np.isfinite(v)
    scaled = np.rint(np.where(null, 0.0, v) * 10.0**decimals).astype(np.int64)
    return scaled, null


def _angle(deg: np.ndarray, deg_width: int) -> np.ndarray:
    """``ddmm.mmmmm`` (or ``dddmm.mmmmm``) of |deg|, rounded to 1e-5 minute with carry."""
    units = np.rint(np.abs(np.asarray(deg, dtype=np.float64)) * 60.0 * 1e5).astype(np.int64)
    d, m = np.divmod(units, 60 * 10**5)
    return _number(d * 100 * 10**5 + m, 5, deg_width + 2, zero_pad=True)


def _times(times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(hhmmss.ss matrix, ddmmyy matrix) of UTC datetime64 values (truncated to 0.01 s)."""
    t = np.asarray(times).astype("datetime64[us]").astype(np.int64)
    day, us = np.divmod(t, US_PER_DAY)
    cs = us // 10_000
    hh, rem = np.divmod(cs, 360_000)
    mm, rem = np.divmod(rem, 6_000)
    hhmmss = (hh * 10_000 + mm * 100) * 100 + rem
    tod = _number(hhmmss, 2, 6, zero_pad=True)
    dates = (day.astype("datetime64[D]"))
    y = dates.astype("datetime64[Y]").astype(np.int64) + 1970
    mo = (dates.astype("datetime64[M]").astype(np.int64) % 12) + 1
    dd = (dates - dates.astype("datetime64[M]")).astype(np.int64) + 1
    ddmmyy = _digits(dd * 10_000 + mo * 100 + (y % 100), 6)
    return tod, ddmmyy


def _finish(body: np.ndarray, talker_type: np.ndarray, line_end: bytes) -> np.ndarray:
    """``$`` + body + ``*`` + checksum + line end, as a NUL-padded matrix."""
    n = body.shape[0]
    full_body = np.hstack([talker_type, body])
    cs = np.bitwise_xor.reduce(full_body, axis=1)
    hexd = np.frombuffer(b"0123456789ABCDEF", dtype=np.uint8)
    tail = np.stack([hexd[cs >> 4], hexd[cs & 15]], axis=1)
    return np.hstack([_const(n, b"$"), full_body, _const(n, b"*"), tail,
                      _const(n, line_end)])


def _sep(n: int) -> np.ndarray:
    return _const(n, b",")


_RMC_MODE = np.frombuffer(b"NADPRFEMS", dtype=np.uint8)  # by GGA quality 0..8


def write_nmea(
    times: np.ndarray,
    lat: np.ndarray,
    lon: np.ndarray,
    h_msl: np.ndarray,
    geoid_sep: np.ndarray,
    quality: np.ndarray,
    n_sats: np.ndarray,
    hdop: np.ndarray,
    pdop: np.ndarray | None = None,
    vdop: np.ndarray | None = None,
    *,
    talker: str = "GP",
    rmc: bool = True,
    gsa: bool = True,
    line_end: bytes = b"\r\n",
) -> bytes:
    """NMEA 0183 text with one GGA (then GSA, then RMC) per epoch, checksums included.

    ``times`` are UTC ``datetime64`` values; ``lat``/``lon`` degrees (+ north / + east);
    ``h_msl`` altitude above mean sea level and ``geoid_sep`` the separation (ellipsoid minus
    geoid), metres; ``quality`` the GGA fix quality 0-8. NaN heights, DOPs or separations
    give empty fields. The RMC status is ``V`` for quality 0, 6, 7 and 8 (no fix, estimated,
    manual, simulated) and ``A`` otherwise; its mode indicator follows the quality; speed and
    course are left empty. The GSA fix type is 3 when quality > 0, else 1.
    """
    t = np.asarray(times)
    n = t.shape[0]
    if len(talker) != 2 or not talker.isalpha():
        raise ValueError(f"talker must be two letters, got {talker!r}")
    lat = np.asarray(lat, dtype=np.float64)
    lon = np.asarray(lon, dtype=np.float64)
    q = np.clip(np.asarray(quality, dtype=np.int64), 0, 8)
    if n == 0:
        return b""
    tod, ddmmyy = _times(t)
    sep = _sep(n)
    lat_f = _angle(lat, 2)
    lon_f = _angle(lon, 3)
    ns = _choice(lat >= 0, b"N", b"S")
    ew = _choice(lon >= 0, b"E", b"W")
    sats = np.asarray(n_sats, dtype=np.int64)
    alt_s, alt_null = _round_scaled(h_msl, 1)
    sep_s, sep_null = _round_scaled(geoid_sep, 1)
    hd_s, hd_null = _round_scaled(hdop, 2)
    gga = np.hstack([
        sep, tod, sep, lat_f, sep, ns, sep, lon_f, sep, ew, sep,
        _digits(q, 1), sep, _digits(np.clip(sats, 0, 99), 2), sep,
        _number(hd_s, 2, 2, null=hd_null), sep,
        _number(alt_s, 1, 5, signed=True, null=alt_null), sep, _const(n, b"M"), sep,
        _number(sep_s, 1, 4, signed=True, null=sep_null), sep, _const(n, b"M"), sep, sep,
    ])
    tt = talker.encode("ascii")
    parts = [_finish(gga, _const(n, tt + b"GGA"), line_end)]
    if gsa:
        nan = np.full(n, np.nan)
        pd_s, pd_null = _round_scaled(nan if pdop is None else pdop, 2)
        vd_s, vd_null = _round_scaled(nan if vdop is None else vdop, 2)
        body = np.hstack([
            sep, _const(n, b"A"), sep, _digits(np.where(q > 0, 3, 1), 1),
            _const(n, b"," * 12), sep,
            _number(pd_s, 2, 2, null=pd_null), sep,
            _number(hd_s, 2, 2, null=hd_null), sep,
            _number(vd_s, 2, 2, null=vd_null),
        ])
        parts.append(_finish(body, _const(n, tt + b"GSA"), line_end))
    if rmc:
        void = np.isin(q, (0, 6, 7, 8))
        body = np.hstack([
            sep, tod, sep, _choice(~void, b"A", b"V"), sep, lat_f, sep, ns, sep, lon_f, sep,
            ew, sep, sep, sep, ddmmyy, sep, sep, sep, _RMC_MODE[q][:, None],
        ])
        parts.append(_finish(body, _const(n, tt + b"RMC"), line_end))
    flat = np.hstack(parts).ravel()
    return flat[flat != 0].tobytes()
