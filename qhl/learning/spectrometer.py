"""Measured FIDs from spectrometer files, read through nmrglue (a general-purpose NMR file library).

Formats (nmrglue does the parsing; this module checks, converts and maps):
    'bruker'  a directory with `acqus` + `fid` (nmrglue.bruker.read). The digital filter of the
              receiver delays the FID by GRPDLY points (or the DECIM/DSPFVS table for old
              firmware); it is removed with nmrglue.bruker.remove_digital_filter: a circular
              shift of the FID by the (truncated) group delay through an FFT phase ramp, then
              floor(delay) + 2 points dropped from the end. The FID read therefore has
              TD/2 - floor(delay) - 2 complex points.
    'varian'  a directory with `procpar` + `fid` (Varian/Agilent layout; nmrglue.varian.read);
              these consoles store the FID without a filter delay, so nothing is removed.
    'jcampdx' a JCAMP-DX file (.jdx, .dx, .jcamp) holding an NMR FID as NTUPLES with real and
              imaginary pages (nmrglue.jcampdx.read; R. S. McDonald, P. A. Wilks, Appl. Spectrosc.
              42, 151 (1988); NMR extension: A. N. Davies, P. Lampen, Appl. Spectrosc. 47, 1093
              (1993)). A Bruker export's `$GRPDLY`/`$DECIM`/`$DSPFVS` are honoured as above.

Parameters taken from the files: spectral width SW (Hz; dwell time 1/SW), observe frequency
(MHz: Bruker BF1 / SFO1, Varian sfrq, JCAMP-DX .OBSERVE FREQUENCY), carrier (Bruker SFO1 and O1,
Varian sfrq and tof), nucleus (NUC1, tn, .OBSERVE NUCLEUS) and the field B = 2 pi nu_obs / |gamma|
(qhl.spins.nuclei, IUPAC 2001). JCAMP-DX gives the dwell time from its time axis (LAST - FIRST) /
(points - 1).

Conversion to qhl's signal convention (qhl.exact.engine: S(t) = Tr[O rho(t)] / Tr[O rho0],
S(0) = 1, a spin at offset +nu gives exp(+2 pi i nu t)):
    S_k = conj(F_k) / conj(F_0)
with F_k the k-th complex point as stored. Sign: nmrglue's spectra (proc_base.fft =
fftshift(fft(F))) put the highest frequency first (fileiobase.unit_conversion: negative ppm step),
so a line at +nu in the stored data rotates as exp(-2 pi i nu t); conjugation turns that into
qhl's exp(+2 pi i nu t) (the time axis keeps its sign). Scale and phase: dividing by the first
point makes S(0) = 1 and removes the receiver phase at t = 0 (a zero-order phase correction);
fit the scale and phase as nuisance parameters (qhl.learning.nuisance) where the first point is
noisy or missing. `conjugate=False` keeps the stored sense of rotation. The noise level sigma
given for measured data is relative to this normalised signal.

Mapping to a cluster file (`load_spectrometer_data`): PATH is one dataset (a directory or a
JCAMP-DX file) or a directory of datasets (subdirectories and JCAMP-DX files, in name order).
Datasets go to `[[experiment]]`s by name (directory or file stem equal to an experiment name)
when every name matches, otherwise by order. Each must agree with its experiment on the nucleus
(the cluster's `observe`), the point count and the dwell time t_max_s / (points - 1) within
DWELL_RTOL; anything else is a one-line QhlInputError.
"""

from dataclasses import dataclass
import math
import os
from pathlib import Path
import warnings

import numpy as np

from ..base.errors import QhlInputError
from ..exact.likelihood import Dataset
from ..spins.cluster import NOISE_RANGE, checked_number
from ..spins.nuclei import nucleus as lookup_nucleus

__all__ = ["Acquisition", "read_acquisition", "read_acquisitions", "load_spectrometer_data", "is_spectrometer_path",
           "DWELL_RTOL", "JCAMP_SUFFIXES", "MAX_FID_BYTES"]

# Dwell times agree within this fraction (files store SW with about 6-10 digits; common practice).
DWELL_RTOL = 1e-6
JCAMP_SUFFIXES = (".jdx", ".dx", ".jcamp", ".jcm")
MAX_FID_BYTES = 1 << 30          # 1 GiB: about 67 million complex float64 points
MAX_TEXT_BYTES = 256 << 20       # JCAMP-DX text
# A stored value outside this magnitude range (or NaN) means the bytes were read in the wrong
# order or type: byte-swapped float64 values land at random exponents (common practice).
PLAUSIBLE_RANGE = (1e-200, 1e200)
PLAUSIBLE_RANGE_32 = (1e-30, 1e30)      # float32 data (Varian/Agilent-style)


@dataclass(frozen=True)
class Acquisition:
    """One FID read from a spectrometer file, in qhl's convention (module docstring).

    Attributes:
        name: the dataset's name (directory name or file stem).
        source: the path read.
        format: 'bruker', 'varian' or 'jcampdx'.
        signal: complex (points,), S(0) = 1 after the conversion.
        dwell_s: time between points (1 / spectral width).
        spectral_width_hz, observe_mhz, carrier_mhz, nucleus ('1H', ...), field_tesla: from the
            parameters (carrier_mhz, observe_mhz, field_tesla, nucleus None where the file lacks them).
        filter_delay_points: the digital-filter delay removed (points; 0 where none).
        first_time_s: time of the first point stored (JCAMP-DX FIRST; 0 elsewhere).
    """

    name: str
    source: str
    format: str
    signal: np.ndarray
    dwell_s: float
    spectral_width_hz: float
    observe_mhz: float | None
    carrier_mhz: float | None
    nucleus: str | None
    field_tesla: float | None
    filter_delay_points: float = 0.0
    first_time_s: float = 0.0

    @property
    def points(self) -> int:
        return int(self.signal.size)

    @property
    def times_s(self) -> np.ndarray:
        return np.arange(self.points) * self.dwell_s

    def describe(self) -> dict:
        return {"name": self.name, "source": self.source, "format": self.format, "points": self.points,
                "dwell_s": self.dwell_s, "spectral_width_hz": self.spectral_width_hz,
                "observe_mhz": self.observe_mhz, "carrier_mhz": self.carrier_mhz, "nucleus": self.nucleus,
                "field_tesla": self.field_tesla, "filter_delay_points": self.filter_delay_points}


# ---------------------------------------------------------------------------- helpers
def _nucleus_symbol(text, source, key):
    """'1H', 'H1', '^1H', '<1H>' -> '1H' (qhl.spins.nuclei), or None for an empty value."""
    s = str(text).strip().strip("<>").replace("^", "").strip()
    if not s or s.lower() == "off":
        return None
    digits = "".join(ch for ch in s if ch.isdigit())
    letters = "".join(ch for ch in s if ch.isalpha())
    try:
        return lookup_nucleus(f"{digits}{letters}" if digits else letters).symbol
    except QhlInputError as e:
        raise QhlInputError(f"nucleus {s!r}: {e}", source=source, key=key) from None


def _field(nuc, observe_mhz):
    if nuc is None or observe_mhz is None or observe_mhz <= 0:
        return None
    return 2 * math.pi * observe_mhz * 1e6 / abs(lookup_nucleus(nuc).gamma_rad_per_s_per_tesla)


def _positive(value, source, key, what):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise QhlInputError(f"expected {what}, got {str(value)[:40]!r}", source=source, key=key) from None
    if not math.isfinite(v) or v <= 0:
        raise QhlInputError(f"expected {what} > 0, got {v:g}", source=source, key=key)
    return v


def _quiet(fn, source, what):
    """Run an nmrglue reader with its warnings held back; its exceptions -> one line."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return fn()
        except QhlInputError:
            raise
        except Exception as e:     # nmrglue raises many types on a broken file
            text = " ".join(str(e).split())[:120] or type(e).__name__
            raise QhlInputError(f"cannot read {what} ({type(e).__name__}: {text})", source=source) from None


def _plausible(values, source, key, hint):
    v = np.asarray(values)
    low, high = PLAUSIBLE_RANGE_32 if v.dtype == np.float32 else PLAUSIBLE_RANGE
    v = v.astype(float)
    a = np.abs(v[v != 0])
    if not np.all(np.isfinite(v)) or (a.size and (a.min() < low or a.max() > high)):
        raise QhlInputError(f"values NaN or outside [{low:g}, {high:g}] in magnitude: {hint}", source=source, key=key)


def _wide_fraction(ints) -> float:
    """Fraction of int32 values that use their top byte (neither 0x00 nor 0xFF: not a sign extension)."""
    top = (np.asarray(ints, np.int64) >> 24) & 0xFF
    return float(np.mean((top != 0) & (top != 0xFF)))


def _int32_byte_order(values, source, hint):
    """int32 data read in the wrong byte order: most values fill all 32 bits although, read the other
    way, almost none do (an ADC word seldom fills its top byte on most points; common practice).
    Conservative: data that fill 32 bits either way pass."""
    ints = np.rint(np.asarray(values, float)).astype(np.int64)
    if ints.size < 16:
        return
    swapped = ints.astype(np.int32).byteswap()
    if _wide_fraction(ints) > 0.5 and _wide_fraction(swapped) < 0.1:
        raise QhlInputError(f"most values fill all 32 bits, but read in the other byte order almost none do: {hint}",
                            source=source, key="BYTORDA")


def _convert(fid, conjugate, source):
    fid = np.asarray(fid, complex)
    if fid.size < 2:
        raise QhlInputError(f"expected an FID of at least 2 complex points, got {fid.size}", source=source)
    if fid[0] == 0:
        raise QhlInputError("the first point of the FID is 0: cannot normalise to S(0) = 1", source=source)
    s = np.conj(fid) if conjugate else fid.copy()
    return s / s[0]


def _require(path, names, source, what):
    for n in names:
        if not (path / n).is_file():
            raise QhlInputError(f"missing {n}: a {what} directory holds {' and '.join(names)}", source=source)


# ---------------------------------------------------------------------------- Bruker
def _read_bruker(path: Path, conjugate=True) -> Acquisition:
    import nmrglue as ng
    source = str(path)
    _require(path, ("acqus", "fid"), source, "Bruker-style")
    acq = _quiet(lambda: ng.bruker.read_jcamp(str(path / "acqus")), str(path / "acqus"), "the parameter file")
    src_acq = str(path / "acqus")

    def key(k, default=None):
        if k not in acq:
            if default is None:
                raise QhlInputError(f"missing parameter {k}", source=src_acq, key=k)
            return default
        return acq[k]

    td = key("TD")
    if not isinstance(td, (int, float)) or td != int(td) or td < 4 or int(td) % 2:
        raise QhlInputError(f"expected an even number of values >= 4 (complex pairs), got {td!r}", source=src_acq,
                            key="TD")
    td = int(td)
    sw = _positive(key("SW_h"), src_acq, "SW_h", "a spectral width in Hz")
    dtype = key("DTYPA", 0)
    item = 8 if dtype == 2 else 4
    size = (path / "fid").stat().st_size
    if size > MAX_FID_BYTES:
        raise QhlInputError(f"file of {size:,} bytes; expected at most {MAX_FID_BYTES:,}", source=str(path / "fid"))
    need = td * item
    block = -(-need // 1024) * 1024          # 1D FIDs may be zero-padded to whole 1 KiB blocks (common practice)
    if size < need:
        raise QhlInputError(f"truncated FID: {size:,} bytes, but TD = {td} values of {item} bytes need {need:,}",
                            source=str(path / "fid"))
    if size > block:
        raise QhlInputError(f"the FID holds {size // item:,} values but acqus TD = {td}: the point count does not "
                            f"match the parameter file", source=str(path / "fid"))
    dic, data = _quiet(lambda: ng.bruker.read(str(path), read_pulseprogram=False, read_procs=False),
                       source, "the Bruker-style FID")
    if key("AQ_mod", 3) == 0:
        raise QhlInputError("AQ_mod = 0 (real, single-channel detection): expected complex (quadrature) data",
                            source=src_acq, key="AQ_mod")
    data = np.ravel(np.asarray(data))
    if not np.iscomplexobj(data):          # nmrglue leaves the values interleaved without AQ_mod
        data = data[:td][0::2] + 1j * data[:td][1::2]
    data = data[: td // 2]
    hint = f"wrong byte order (BYTORDA = {key('BYTORDA', 0)}) or data type (DTYPA = {dtype})?"
    _plausible(data.view(float) if np.iscomplexobj(data) else data, str(path / "fid"), "BYTORDA", hint)
    if item == 4:
        _int32_byte_order(np.concatenate([data.real, data.imag]), str(path / "fid"), hint)
    if not any(k in acq for k in ("GRPDLY", "DECIM", "DSPFVS")):
        corrected, delay = data, 0.0          # no digital-filter parameters: an FID without a filter delay
    else:
        grpdly = float(key("GRPDLY", 0.0) or 0.0)
        decim, dspfvs = key("DECIM", 1), key("DSPFVS", 20)
        # nmrglue: GRPDLY > 0 is used directly; otherwise its firmware table (DSPFVS >= 14: no delay).
        dic["acqus"].setdefault("DECIM", decim)
        dic["acqus"].setdefault("DSPFVS", dspfvs)
        corrected = _quiet(lambda: ng.bruker.remove_digital_filter(dic, data), source,
                           "the digital-filter parameters (GRPDLY, DECIM, DSPFVS)")
        delay = grpdly if grpdly > 0 else (
            0.0 if dspfvs >= 14 else float(ng.bruker.bruker_dsp_table.get(dspfvs, {}).get(decim, 0.0)))
    nuc = _nucleus_symbol(key("NUC1", ""), src_acq, "NUC1")
    bf1 = float(key("BF1", 0.0) or 0.0) or None
    sfo1 = float(key("SFO1", 0.0) or 0.0) or None
    return Acquisition(path.name, source, "bruker", _convert(corrected, conjugate, source), 1.0 / sw, sw,
                       sfo1 or bf1, sfo1, nuc, _field(nuc, bf1 or sfo1), float(math.floor(delay)))


# ---------------------------------------------------------------------------- Varian / Agilent
def _read_varian(path: Path, conjugate=True) -> Acquisition:
    import nmrglue as ng
    source = str(path)
    _require(path, ("procpar", "fid"), source, "Varian/Agilent-style")
    src_par = str(path / "procpar")
    par = _quiet(lambda: ng.varian.read_procpar(src_par), src_par, "the parameter file")

    def value(k, required=True):
        if k not in par or not par[k].get("values"):
            if required:
                raise QhlInputError(f"missing parameter {k}", source=src_par, key=k)
            return None
        return par[k]["values"][0]

    n_values = _positive(value("np"), src_par, "np", "a number of values")
    sw = _positive(value("sw"), src_par, "sw", "a spectral width in Hz")
    fid_path = path / "fid"
    size = fid_path.stat().st_size
    if size > MAX_FID_BYTES:
        raise QhlInputError(f"file of {size:,} bytes; expected at most {MAX_FID_BYTES:,}", source=str(fid_path))
    if size < 32:
        raise QhlInputError(f"truncated FID: {size} bytes, shorter than the 32-byte file header", source=str(fid_path))
    head = np.frombuffer(fid_path.read_bytes()[:24], ">i4")   # nblocks, ntraces, np, ebytes, tbytes, bbytes
    nblocks, ntraces, npts, ebytes, tbytes, bbytes = (int(x) for x in head)
    if not (0 < nblocks < 1 << 24 and 0 < ntraces < 1 << 24 and 0 < npts < 1 << 28 and ebytes in (2, 4)
            and bbytes > 0):
        raise QhlInputError(f"implausible file header (blocks {nblocks}, traces {ntraces}, values {npts}, "
                            f"bytes per value {ebytes}): wrong byte order (this layout is big-endian) or not an FID",
                            source=str(fid_path), key="header")
    need = 32 + nblocks * bbytes
    if size < need:
        raise QhlInputError(f"truncated FID: {size:,} bytes, but the header's {nblocks} block(s) of {bbytes:,} "
                            f"bytes need {need:,}", source=str(fid_path))
    if npts != int(n_values):
        raise QhlInputError(f"the FID holds {npts} values per trace but procpar np = {int(n_values)}: the point "
                            f"count does not match the parameter file", source=str(fid_path))
    dic, data = _quiet(lambda: ng.varian.read(str(path)), source, "the Varian/Agilent-style FID")
    data = np.asarray(data)
    if data.ndim > 1:
        data = data[0]
    _plausible(data.view(np.float32 if data.dtype == np.complex64 else float), str(fid_path), "header",
               "wrong byte order or data type?")
    nuc = _nucleus_symbol(value("tn", False) or "", src_par, "tn")
    sfrq = value("sfrq", False)
    sfrq = float(sfrq) if sfrq not in (None, "") else None
    return Acquisition(path.name, source, "varian", _convert(data, conjugate, source), 1.0 / sw, sw, sfrq, sfrq, nuc,
                       _field(nuc, sfrq), 0.0)


# ---------------------------------------------------------------------------- JCAMP-DX
def _jcamp_list(dic, k, source):
    if k not in dic or not dic[k]:
        raise QhlInputError(f"missing ##{k}", source=source, key=k)
    return [x.strip() for x in str(dic[k][0]).split(",")]


def _read_jcampdx(path: Path, conjugate=True) -> Acquisition:
    import nmrglue as ng
    source = str(path)
    if not path.is_file():
        raise QhlInputError("no such file", source=source)
    size = path.stat().st_size
    if size > MAX_TEXT_BYTES:
        raise QhlInputError(f"file of {size:,} bytes; expected at most {MAX_TEXT_BYTES:,}", source=source)
    if size == 0:
        raise QhlInputError("empty file: expected a JCAMP-DX NMR FID", source=source)
    dic, data = _quiet(lambda: ng.jcampdx.read(str(path)), source, "the JCAMP-DX file")
    kind = " ".join(str(dic.get("DATATYPE", [""])[0]).upper().split())
    if "FID" not in kind:
        raise QhlInputError(f"expected ##DATA TYPE= NMR FID, got {kind or '(none)'!r}", source=source, key="DATA TYPE")
    if not isinstance(data, list) or len(data) != 2 or data[0] is None or data[1] is None:
        raise QhlInputError("expected NTUPLES with a real (R) and an imaginary (I) page", source=source,
                            key="NTUPLES")
    re_, im = np.asarray(data[0], float), np.asarray(data[1], float)
    symbols = _jcamp_list(dic, "SYMBOL", source)
    try:
        ix = [s.upper() for s in symbols].index("X")
        first = float(_jcamp_list(dic, "FIRST", source)[ix])
        last = float(_jcamp_list(dic, "LAST", source)[ix])
        dims = [int(float(v)) for v in _jcamp_list(dic, "VARDIM", source)]
        unit = _jcamp_list(dic, "UNITS", source)[ix].upper()
    except (ValueError, IndexError):
        raise QhlInputError(f"cannot read the time axis from ##SYMBOL {symbols}, ##FIRST, ##LAST, ##VAR_DIM",
                            source=source) from None
    n = dims[ix] if ix < len(dims) else -1
    if re_.size != im.size or re_.size != n:
        raise QhlInputError(f"##VAR_DIM= {n} points, but the pages hold {re_.size} real and {im.size} imaginary "
                            f"values (truncated file or mismatched point count)", source=source, key="VAR_DIM")
    if unit not in ("SECONDS", "S", "SEC", "SECOND"):
        raise QhlInputError(f"expected the time axis in SECONDS, got {unit!r}", source=source, key="UNITS")
    if not (math.isfinite(first) and math.isfinite(last) and last > first and n >= 2):
        raise QhlInputError(f"expected LAST > FIRST on the time axis, got {first:g} and {last:g}", source=source,
                            key="LAST")
    fid = re_ + 1j * im
    _plausible(fid.view(float), source, "FACTOR", "bad ##FACTOR?")
    dwell = (last - first) / (n - 1)
    delay = 0.0
    if "$GRPDLY" in dic or "$DECIM" in dic:
        def num(k, default):
            try:
                return float(dic[k][0]) if k in dic else default
            except ValueError:
                raise QhlInputError(f"expected a number, got {dic[k][0]!r}", source=source, key=k) from None
        grpdly, decim, dspfvs = num("$GRPDLY", 0.0), int(num("$DECIM", 1)), int(num("$DSPFVS", 20))
        fid = _quiet(lambda: ng.bruker.rm_dig_filter(fid, decim, dspfvs, grpdly), source, "the digital-filter keys")
        delay = float(math.floor(grpdly)) if grpdly > 0 else 0.0
    nuc_text = dic.get(".OBSERVENUCLEUS", [""])[0]
    nuc = _nucleus_symbol(nuc_text, source, ".OBSERVE NUCLEUS")
    obs = dic.get(".OBSERVEFREQUENCY", [None])[0]
    obs = _positive(obs, source, ".OBSERVE FREQUENCY", "a frequency in MHz") if obs is not None else None
    return Acquisition(path.stem, source, "jcampdx", _convert(fid, conjugate, source), dwell, 1.0 / dwell, obs, None,
                       nuc, _field(nuc, obs), delay, first)


# ---------------------------------------------------------------------------- dispatch
def _kind(path: Path):
    if path.is_file() and path.suffix.lower() in JCAMP_SUFFIXES:
        return "jcampdx"
    if path.is_dir():
        if (path / "acqus").exists():
            return "bruker"
        if (path / "procpar").exists():
            return "varian"
        if (path / "fid").exists():
            return "fid-only"
    return None


def is_spectrometer_path(path) -> bool:
    """True for a directory or a JCAMP-DX file (what `read_acquisitions` takes); CSV files are not."""
    p = Path(path)
    return p.is_dir() or p.suffix.lower() in JCAMP_SUFFIXES


def read_acquisition(path, conjugate: bool = True) -> Acquisition:
    """Read one dataset: a Bruker-style or Varian/Agilent-style directory, or a JCAMP-DX file.

    Raises:
        QhlInputError: missing parameter file, truncated FID, point count not matching the
            parameters, implausible values (wrong byte order), unreadable file.

    Example:
        >>> import numpy as np, tempfile, nmrglue as ng
        >>> d = tempfile.mkdtemp() + "/static"
        >>> acqus = {"_coreheader": ["##TITLE= invented"], "_comments": [], "TD": 20, "SW_h": 1e4,
        ...          "BF1": 400.0, "SFO1": 400.0, "NUC1": "1H", "GRPDLY": 0.0, "DECIM": 1, "DSPFVS": 20,
        ...          "BYTORDA": 0, "DTYPA": 2}
        >>> fid = np.exp(-2j * np.pi * 500 * np.arange(10) * 1e-4)    # stored sense: exp(-i w t)
        >>> ng.bruker.write(d, {"acqus": acqus}, fid, write_prog=False)
        >>> a = read_acquisition(d)
        >>> a.points, a.dwell_s, a.nucleus, round(a.field_tesla, 3)
        (8, 0.0001, '1H', 9.395)
        >>> bool(np.allclose(a.signal, np.exp(2j * np.pi * 500 * a.times_s)))
        True
    """
    p = Path(path)
    source = str(p)
    if not p.exists():
        raise QhlInputError("no such file or directory", source=source)
    kind = _kind(p)
    if kind == "jcampdx":
        return _read_jcampdx(p, conjugate)
    if kind == "bruker":
        return _read_bruker(p, conjugate)
    if kind == "varian":
        return _read_varian(p, conjugate)
    if kind == "fid-only":
        raise QhlInputError("missing parameter file: a fid but neither acqus (Bruker-style) nor procpar "
                            "(Varian/Agilent-style)", source=source)
    raise QhlInputError(f"not a spectrometer dataset: expected a directory with acqus + fid or procpar + fid, "
                        f"or a JCAMP-DX file ({', '.join(JCAMP_SUFFIXES)})", source=source)


def read_acquisitions(path, conjugate: bool = True) -> list:
    """All datasets under `path`: the dataset itself, or each dataset directly inside it (name order)."""
    p = Path(path)
    if not p.exists():
        raise QhlInputError("no such file or directory", source=str(p))
    if _kind(p) is not None:
        return [read_acquisition(p, conjugate)]
    if p.is_dir():
        entries = sorted(os.listdir(p))
        inside = [p / e for e in entries if _kind(p / e) is not None]
        if not inside:
            raise QhlInputError("no dataset found: expected a directory with acqus + fid or procpar + fid, a "
                                "JCAMP-DX file, or a directory holding such datasets", source=str(p))
        return [read_acquisition(q, conjugate) for q in inside]
    return [read_acquisition(p, conjugate)]


def _match(acquisitions, cluster, source):
    names = [ex.name for ex in cluster.experiments]
    if all(a.name in names for a in acquisitions) and len({a.name for a in acquisitions}) == len(acquisitions):
        return [(a, cluster.experiment(a.name)) for a in acquisitions]
    if len(acquisitions) > len(names):
        raise QhlInputError(f"{len(acquisitions)} datasets ({', '.join(a.name for a in acquisitions)}) but the cluster "
                            f"defines {len(names)} experiment(s) ({', '.join(names)}): name them after the "
                            f"experiments or add [[experiment]]s", source=source)
    return list(zip(acquisitions, cluster.experiments))


def load_spectrometer_data(path, cluster, sigma=None, conjugate: bool = True):
    """Read spectrometer data and map it onto the experiments of `cluster` (module docstring).

    Args:
        path: a dataset (directory or JCAMP-DX file) or a directory of datasets.
        cluster: the Cluster; its `observe` and each experiment's points and t_max_s are checked.
        sigma: noise per point of Re and Im relative to the normalised signal (default: each
            experiment's `noise`).
        conjugate: convert the stored sense of rotation to qhl's (module docstring).

    Returns:
        (Dataset in cluster order, [Acquisition, ...] in the same order).

    Raises:
        QhlInputError: any reader error; nucleus, point count or dwell time disagreeing with the
            cluster file; no noise level.
    """
    source = str(path)
    acqs = read_acquisitions(path, conjugate)
    if sigma is not None:
        sigma = checked_number(sigma, "sigma", source, low=NOISE_RANGE[0], high=NOISE_RANGE[1])
    observe = lookup_nucleus(cluster.observe).symbol
    pairs = []
    for a, ex in _match(acqs, cluster, source):
        where = f"dataset '{a.name}' -> experiment '{ex.name}'"
        if a.nucleus is not None and a.nucleus != observe:
            raise QhlInputError(f"{where}: nucleus {a.nucleus}, but the cluster observes {observe}", source=a.source,
                                key="nucleus")
        if a.points != ex.points:
            extra = (f" (after removing the digital filter: {a.filter_delay_points:g} + 2 points fewer than stored)"
                     if a.format == "bruker" else "")
            raise QhlInputError(f"{where}: {a.points} points{extra}, but the experiment has points = {ex.points}",
                                source=a.source, key="points")
        dwell = ex.t_max_s / (ex.points - 1)
        if abs(a.dwell_s - dwell) > DWELL_RTOL * dwell:
            raise QhlInputError(f"{where}: dwell time {a.dwell_s:.9g} s (spectral width {a.spectral_width_hz:.9g} Hz), "
                                f"but the experiment has t_max_s/(points-1) = {dwell:.9g} s: set t_max_s = "
                                f"{a.dwell_s * (ex.points - 1):.9g}", source=a.source, key="dwell")
        pairs.append((ex, a))
    order = {ex.name: k for k, ex in enumerate(cluster.experiments)}
    pairs.sort(key=lambda p: order[p[0].name])
    signals = {}
    for ex, a in pairs:
        value = sigma if sigma is not None else ex.noise
        if value is None:
            raise QhlInputError(f"no noise level for experiment '{ex.name}': set its noise in the cluster file or "
                                f"give sigma (--noise), relative to S(0) = 1", source=a.source)
        signals[ex.name] = (ex.times_s, a.signal, np.full(ex.points, float(value)))
    return Dataset(signals), [a for _, a in pairs]
