# SPDX-License-Identifier: GPL-3.0-or-later
"""Recordings on disk: opening SigMF and raw sample files, writing SigMF, and
merging annotations into a SigMF metadata file.

The sample data is never loaded here: :func:`open_recording` only resolves
*where* the samples are (file, byte offset, count) and *how* they are stored
(:data:`FORMATS`), so that a GNU Radio file source can stream them. SigMF
metadata is read, validated and written through the ``sigmf`` library.

Partial-sample policy: when the data holds a number of bytes that is not a
whole number of samples, the whole samples are used and the trailing bytes are
reported in :attr:`Recording.warnings` (a truncated capture is still worth
processing). A data file with no whole sample at all is bad input.
"""

import json
import os
import tarfile
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


class RecordingError(ValueError):
    """A recording cannot be used: missing, unreadable or invalid. The message is one line."""


@dataclass(frozen=True)
class SampleFormat:
    """How one complex sample is stored: SigMF datatype name, bytes per component,
    numpy component type, and the scale that maps stored values to about +-1."""
    name: str
    component_bytes: int
    component_dtype: str
    offset: float = 0.0          #: subtracted from each stored component before scaling
    scale: float = 1.0           #: multiplied after the offset

    @property
    def sample_bytes(self):
        """Bytes per complex sample."""
        return 2 * self.component_bytes

    def to_complex(self, raw):
        """Convert stored components (numpy array of ``component_dtype``, I/Q interleaved)
        to complex64. Used for small test arrays and by the writer's round trip check;
        the receiver streams with GNU Radio conversion blocks instead."""
        v = (np.asarray(raw, self.component_dtype).astype(np.float32) - self.offset) * self.scale
        return (v[0::2] + 1j * v[1::2]).astype(np.complex64)

    def from_complex(self, samples):
        """Quantise complex samples (about +-1 full scale) to interleaved stored components."""
        s = np.asarray(samples, np.complex64)
        v = np.empty(2 * len(s), np.float64)
        v[0::2], v[1::2] = s.real, s.imag
        v = v / self.scale + self.offset
        info = np.iinfo(self.component_dtype) if self.component_dtype[-2] in "iu" else None
        if info is not None:
            v = np.clip(np.rint(v), info.min, info.max)
        return v.astype(self.component_dtype)


#: Supported sample formats (SigMF ``core:datatype`` names), little-endian where it matters.
#: ci16 is scaled by 1/32768, ci8 by 1/128, cu8 is offset binary ``(v - 127.5) / 127.5``.
FORMATS = {
    "cf32_le": SampleFormat("cf32_le", 4, "<f4"),
    "ci16_le": SampleFormat("ci16_le", 2, "<i2", 0.0, 1.0 / 32768.0),
    "ci8": SampleFormat("ci8", 1, "i1", 0.0, 1.0 / 128.0),
    "cu8": SampleFormat("cu8", 1, "u1", 127.5, 1.0 / 127.5),
}


@dataclass
class Recording:
    """Where a recording's samples are and what is known about them."""
    data_path: Path                  #: file holding the samples (data file or archive)
    data_offset: int                 #: byte offset of the first sample in ``data_path``
    num_samples: int                 #: whole complex samples available
    fmt: SampleFormat
    sample_rate: float               #: samples/s
    center_freq_hz: float = None     #: ``core:frequency`` of the first capture, Hz, if known
    meta_path: Path = None           #: the .sigmf-meta file (None for raw files and archives)
    kind: str = "raw"                #: "sigmf", "archive" or "raw"
    warnings: list = field(default_factory=list)

    @property
    def duration_s(self):
        """Length of the recording, s."""
        return self.num_samples / self.sample_rate


def _check_rate(rate, what):
    try:
        rate = float(rate)
    except (TypeError, ValueError):
        raise RecordingError(f"{what} must be a number of samples/s, got {rate!r}") from None
    if not np.isfinite(rate) or rate <= 0:
        raise RecordingError(f"{what} must be a positive number of samples/s, got {rate!r}")
    return rate


def _format(name, what):
    if not isinstance(name, str) or name.lower() not in FORMATS:
        raise RecordingError(f"unsupported {what} {name!r}; supported: {', '.join(FORMATS)}")
    return FORMATS[name.lower()]


def _whole_samples(rec_path, nbytes, fmt):
    """Number of whole samples in ``nbytes``; the partial-sample policy lives here."""
    count, extra = divmod(nbytes, fmt.sample_bytes)
    notes = []
    if count == 0:
        raise RecordingError(f"{rec_path}: the data holds no whole {fmt.name} sample ({nbytes} bytes)")
    if extra:
        notes.append(f"{rec_path}: data is not a whole number of {fmt.name} samples; "
                     f"ignoring the last {extra} byte(s)")
    return count, notes


def open_raw(path, sample_rate, fmt_name):
    """A raw interleaved I/Q file with the given rate (samples/s) and format name."""
    path = Path(path)
    rate = _check_rate(sample_rate, "--sample-rate")
    fmt = _format(fmt_name, "--format")
    if not path.is_file():
        raise RecordingError(f"{path}: no such file")
    if not os.access(path, os.R_OK):
        raise RecordingError(f"{path}: not readable")
    count, notes = _whole_samples(path, path.stat().st_size, fmt)
    return Recording(path, 0, count, fmt, rate, None, None, "raw", notes)


def is_sigmf_path(path):
    """True if ``path`` names a SigMF metadata, data or archive file (by extension)."""
    name = str(path).lower()
    return name.endswith((".sigmf-meta", ".sigmf-data", ".sigmf"))


def _read_meta_json(meta_path):
    """Parse a .sigmf-meta file with messages that name the problem."""
    try:
        with open(meta_path, "rb") as f:
            meta = json.load(f)
    except json.JSONDecodeError as exc:
        raise RecordingError(f"{meta_path}: not valid JSON ({exc.msg} at line {exc.lineno}, "
                             f"column {exc.colno})") from None
    except UnicodeDecodeError:
        raise RecordingError(f"{meta_path}: not valid JSON (not UTF-8 text)") from None
    except OSError as exc:
        raise RecordingError(f"{meta_path}: cannot read ({exc.strerror})") from None
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise RecordingError(f"{meta_path}: not SigMF metadata (no \"global\" object)")
    return meta


def _check_global(where, meta):
    """Check the fields this tool needs; returns (format, sample_rate)."""
    glob = meta["global"]
    if "core:datatype" not in glob:
        raise RecordingError(f"{where}: metadata has no core:datatype")
    fmt = _format(glob["core:datatype"], "core:datatype")
    if "core:sample_rate" not in glob:
        raise RecordingError(f"{where}: metadata has no core:sample_rate")
    rate = _check_rate(glob["core:sample_rate"], "core:sample_rate")
    if int(glob.get("core:num_channels", 1)) != 1:
        raise RecordingError(f"{where}: only single-channel recordings are supported")
    return fmt, rate


def _first_capture_frequency(meta):
    caps = meta.get("captures") or []
    if caps and isinstance(caps[0], dict) and "core:frequency" in caps[0]:
        try:
            return float(caps[0]["core:frequency"])
        except (TypeError, ValueError):
            return None
    return None


def _sigmf_error(where, exc):
    msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return RecordingError(f"{where}: {msg}")


def _validate_meta(where, meta):
    """Validate metadata (dict) with the ``sigmf`` library; RecordingError if invalid."""
    import jsonschema
    from sigmf import error as sigmf_error
    from sigmf import sigmffile

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            sigmffile.SigMFFile(metadata=meta).validate()
        except jsonschema.ValidationError as exc:
            raise RecordingError(f"{where}: invalid SigMF metadata: {exc.message}") from None
        except (sigmf_error.SigMFError, ValueError, KeyError, TypeError) as exc:
            raise _sigmf_error(where, exc) from None
    return [str(w.message) for w in caught]


def _archive_members(path):
    """(metadata dict, byte offset of the data member, its size) of an uncompressed
    SigMF archive (a tar holding NAME/NAME.sigmf-meta and NAME/NAME.sigmf-data)."""
    try:
        with tarfile.open(path, "r:") as tar:
            files = [m for m in tar.getmembers() if m.isfile()]
            metas = [m for m in files if m.name.endswith(".sigmf-meta")]
            datas = [m for m in files if m.name.endswith(".sigmf-data")]
            if len(metas) != 1 or len(datas) != 1:
                raise RecordingError(f"{path}: a SigMF archive must hold one .sigmf-meta and one "
                                     f".sigmf-data file (found {len(metas)} and {len(datas)})")
            raw = tar.extractfile(metas[0]).read()
            data = datas[0]
    except tarfile.ReadError as exc:
        msg = "compressed archives are not supported, extract it first" if "compress" in str(exc) \
            else f"not a SigMF archive ({exc})"
        raise RecordingError(f"{path}: {msg}") from None
    except OSError as exc:
        raise RecordingError(f"{path}: cannot read ({exc.strerror or exc})") from None
    try:
        meta = json.loads(raw)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise RecordingError(f"{path}: its metadata is not valid JSON ({exc})") from None
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise RecordingError(f"{path}: not SigMF metadata (no \"global\" object)")
    return meta, data.offset_data, data.size


def open_sigmf(path):
    """A SigMF recording given its .sigmf-meta, .sigmf-data or .sigmf (archive) path.

    The metadata is checked for the fields this tool needs and validated by the
    ``sigmf`` library, which also resolves the data file of a metadata/data pair.
    The samples are not read here, and the data checksum is not recomputed (files
    can be large). Archives must be uncompressed tar files (the ``.sigmf`` format);
    their data member is streamed in place.
    """
    from sigmf import error as sigmf_error
    from sigmf import sigmffile

    path = Path(path)
    if str(path).lower().endswith(".sigmf"):
        if not path.is_file():
            raise RecordingError(f"{path}: no such file")
        meta, offset, nbytes = _archive_members(path)
        fmt, rate = _check_global(path, meta)
        notes = _validate_meta(path, meta)
        data_path, meta_path, kind = path, None, "archive"
    else:
        meta_path = sigmffile.get_sigmf_filenames(path)["meta_fn"]
        if not meta_path.is_file():
            raise RecordingError(f"{meta_path}: no such file")
        meta = _read_meta_json(meta_path)
        fmt, rate = _check_global(meta_path, meta)
        notes = _validate_meta(meta_path, meta)
        try:
            data_path = sigmffile.get_dataset_filename_from_metadata(meta_path, meta)
        except sigmf_error.SigMFError as exc:
            raise _sigmf_error(meta_path, exc) from None
        if data_path is None:
            raise RecordingError(f"{meta_path}: data file "
                                 f"{sigmffile.get_sigmf_filenames(path)['data_fn']} not found")
        data_path = Path(data_path)
        offset = 0
        nbytes = data_path.stat().st_size
        kind = "sigmf"
    # non-conforming datasets: header bytes before the samples, trailing bytes after
    header = sum(int(c.get("core:header_bytes", 0)) for c in meta.get("captures") or [])
    trailing = int(meta["global"].get("core:trailing_bytes", 0))
    if header + trailing > nbytes:
        raise RecordingError(f"{data_path}: shorter than its header and trailing bytes")
    if not os.access(data_path, os.R_OK):
        raise RecordingError(f"{data_path}: not readable")
    count, more = _whole_samples(data_path, nbytes - header - trailing, fmt)
    return Recording(data_path, offset + header, count, fmt, rate, _first_capture_frequency(meta),
                     meta_path, kind, notes + more)


def open_recording(path, sample_rate=None, fmt_name=None):
    """Open ``path`` as a raw file when ``sample_rate`` or ``fmt_name`` is given (both are
    then required), else as a SigMF recording."""
    if sample_rate is None and fmt_name is None:
        for ext in (".sigmf-meta", ".sigmf"):      # a base name without extension
            if not is_sigmf_path(path) and Path(f"{path}{ext}").is_file():
                path = Path(f"{path}{ext}")
        if not is_sigmf_path(path):
            raise RecordingError(f"{path}: not a SigMF recording (.sigmf-meta, .sigmf-data or .sigmf); "
                                 "a raw file needs --sample-rate and --format")
        return open_sigmf(path)
    if is_sigmf_path(path):
        raise RecordingError("--sample-rate and --format are for raw files; "
                             "a SigMF recording carries its own")
    if sample_rate is None or fmt_name is None:
        raise RecordingError("a raw file needs both --sample-rate and --format")
    return open_raw(path, sample_rate, fmt_name)


# --- writing ---------------------------------------------------------------------------

#: Extension namespace under which this tool stores its own annotation fields.
EXTENSION = {"name": "coherer", "version": "1.0.0", "optional": True}
#: ``core:generator`` of every annotation this tool writes (replaced on a re-run).
GENERATOR = "gr-coherer"


def write_sigmf(base_path, samples, sample_rate, fmt_name="cf32_le", center_freq_hz=None,
                description=None, extra_global=None):
    """Write ``samples`` (complex, about +-1) as ``base_path.sigmf-data`` + ``.sigmf-meta``.

    Returns the metadata path. The metadata is built and validated by the ``sigmf`` library.
    """
    from sigmf import sigmffile

    fmt = _format(fmt_name, "format")
    base = Path(base_path)
    fns = sigmffile.get_sigmf_filenames(base)
    fmt.from_complex(samples).tofile(fns["data_fn"])
    glob = {"core:datatype": fmt.name, "core:sample_rate": float(sample_rate),
            "core:version": _sigmf_version()}
    if description:
        glob["core:description"] = description
    glob.update(extra_global or {})
    sf = sigmffile.SigMFFile(global_info=glob)
    capture = {} if center_freq_hz is None else {"core:frequency": float(center_freq_hz)}
    sf.add_capture(0, metadata=capture)
    sf.set_data_file(fns["data_fn"], skip_checksum=False)
    sf.validate()
    _atomic_write_json(fns["meta_fn"], sf.ordered_metadata())
    return fns["meta_fn"]


def _sigmf_version():
    import sigmf
    return sigmf.__specification__


def _umask():
    """The process umask (read from /proc where possible: setting it to read it back
    would briefly change it for every thread)."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _atomic_write_json(path, obj):
    """Write JSON to a temporary file in the same folder, then rename it over ``path``."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w") as f:
            json.dump(obj, f, indent=4)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        # mkstemp makes the file 0600; give it the existing file's mode, or what a new
        # file gets under the umask (as the data file written next to it)
        os.chmod(tmp, path.stat().st_mode & 0o7777 if path.exists() else 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def merge_annotations(meta_path, annotations):
    """Add ``annotations`` (list of SigMF annotation dicts) to the metadata file.

    Every existing field, capture and annotation is kept, except annotations an
    earlier run of this tool wrote (``core:generator`` == :data:`GENERATOR`), which
    are replaced. The ``coherer`` extension is declared in ``core:extensions``. The
    result is validated by the ``sigmf`` library before it replaces the file
    atomically; on any failure the original file is untouched.
    """
    meta_path = Path(meta_path)
    meta = _read_meta_json(meta_path)
    old = [a for a in meta.get("annotations", []) if a.get("core:generator") != GENERATOR]
    new = [dict(a, **{"core:generator": GENERATOR}) for a in annotations]
    meta["annotations"] = sorted(old + new, key=lambda a: a.get("core:sample_start", 0))
    exts = meta["global"].setdefault("core:extensions", [])
    if not any(e.get("name") == EXTENSION["name"] for e in exts):
        exts.append(dict(EXTENSION))
    _validate_meta(f"{meta_path} (with the new annotations)", meta)
    _atomic_write_json(meta_path, meta)
    return meta


def read_samples(rec, start, count):
    """``count`` samples (complex64) of recording ``rec`` from sample ``start`` on (fewer at
    the end of the file)."""
    start = max(0, int(start))
    count = max(0, min(int(count), rec.num_samples - start))
    fmt = rec.fmt
    raw = np.fromfile(rec.data_path, dtype=fmt.component_dtype, count=2 * count,
                      offset=rec.data_offset + start * fmt.sample_bytes)
    return fmt.to_complex(raw)
