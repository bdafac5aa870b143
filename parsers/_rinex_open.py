"""Open a RINEX file of any usual packing as a stream of text lines (the one I/O helper here).

The parsers themselves are line-fed and sans-IO; this module is the convenience layer that turns a
path into lines for them. The packing is recognised from the content, not the file name:

* gzip (``1f 8b``) and bzip2 (``BZh``): streamed through the standard library decompressors.
* Unix ``compress`` (``1f 9d``, old ``.Z`` archives): ``ncompress`` (a dependency of ``hatanaka``)
  only decompresses whole buffers, so the *compressed and the decompressed* file are held in memory.
* Hatanaka Compact RINEX (first line labelled ``CRINEX VERS   / TYPE``, RNXCMP format): streamed
  through the ``crx2rnx`` executable that ships inside the ``hatanaka`` package, fed by a helper
  thread, so memory stays bounded by the pipe buffers. If that executable is missing we fall back to
  ``hatanaka.decompress`` on the whole content: then the full decompressed file is in memory
  (about 3–4× the .crx size; roughly 0.5–1 GB for a 24 h 1 Hz multi-GNSS file).

Lines are decoded as Latin-1 so that stray non-ASCII bytes in comments never stop a replay.
"""

from __future__ import annotations

import bz2
import gzip
import io
import shutil
import subprocess
import tempfile
import threading
from contextlib import contextmanager
from importlib import resources
from typing import IO, TYPE_CHECKING

from ._errors import ParseError

if TYPE_CHECKING:
    from collections.abc import Iterator
    from os import PathLike

__all__ = ["open_rinex_text"]

_CRINEX_LABEL = "CRINEX VERS   / TYPE"
_ENCODING = "latin-1"
#: crx2rnx exit codes that mean success (2 = success with warnings), per the RNXCMP documentation.
_CRX2RNX_OK = (0, 2)


def _crx2rnx_path() -> str | None:
    try:
        exe = resources.files("hatanaka.bin").joinpath("crx2rnx")
    except ModuleNotFoundError:
        return None
    return str(exe) if exe.is_file() else None


def _open_binary(path: str | PathLike[str]) -> IO[bytes]:
    """The file, decompressed if it is gzip/bzip2/compress (by magic bytes), positioned at 0."""
    f: IO[bytes] = open(path, "rb")  # noqa: SIM115 - returned to the caller, who closes it
    magic = f.read(3)
    f.seek(0)
    if magic[:2] == b"\x1f\x8b":
        return gzip.GzipFile(fileobj=f, mode="rb")
    if magic == b"BZh":
        return bz2.BZ2File(f, mode="rb")
    if magic[:2] == b"\x1f\x9d":
        import ncompress  # type: ignore[import-not-found, unused-ignore]  # noqa: PLC0415

        try:
            data = ncompress.decompress(f.read())
        finally:
            f.close()
        return io.BytesIO(data)
    return f


def _feed(src: IO[bytes], dst: IO[bytes]) -> None:
    """Helper-thread body: copy the Compact RINEX bytes into crx2rnx's stdin, then close it."""
    try:
        shutil.copyfileobj(src, dst, 1 << 16)
    except (BrokenPipeError, OSError, EOFError, ValueError):
        pass  # the reader stopped early (or the input is corrupt); crx2rnx's exit code tells
    finally:
        try:
            dst.close()
        except OSError:
            pass


def _hatanaka_lines(src: IO[bytes], path: str) -> Iterator[str]:
    exe = _crx2rnx_path()
    if exe is None:  # documented fallback: whole file in memory
        import hatanaka  # noqa: PLC0415

        try:
            text = hatanaka.crx2rnx(src.read())
        except hatanaka.HatanakaException as exc:
            raise ParseError(f"{path}: Hatanaka decompression failed: {exc}") from exc
        yield from io.StringIO(text.decode(_ENCODING))
        return
    with tempfile.TemporaryFile() as err:
        proc = subprocess.Popen(  # noqa: S603 - fixed executable from the hatanaka package
            [exe, "-"], stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=err
        )
        assert proc.stdin is not None and proc.stdout is not None
        feeder = threading.Thread(
            target=_feed, args=(src, proc.stdin), name="rinex.crx2rnx-feed", daemon=True
        )
        feeder.start()
        finished = False
        try:
            yield from io.TextIOWrapper(proc.stdout, encoding=_ENCODING, newline="")
            finished = True
        finally:
            if not finished and proc.poll() is None:
                proc.kill()
            proc.stdout.close()
            code = proc.wait()
            feeder.join()
        if code not in _CRX2RNX_OK:
            err.seek(0)
            msg = err.read().decode(_ENCODING, "replace").strip().splitlines()
            reason = msg[0] if msg else f"exit code {code}"
            raise ParseError(f"{path}: Hatanaka decompression failed: {reason}")


@contextmanager
def open_rinex_text(path: str | PathLike[str]) -> Iterator[Iterator[str]]:
    """Context manager yielding the lines (with newlines) of a plain or packed RINEX file."""
    src = _open_binary(path)
    try:
        first = src.readline(256).decode(_ENCODING)
        src.seek(0)
        if first[60:80].strip() == _CRINEX_LABEL.strip() or first.startswith("1.0 ", 5):
            yield _hatanaka_lines(src, str(path))
        else:
            yield io.TextIOWrapper(src, encoding=_ENCODING, newline="")  # type: ignore[arg-type]
    except (OSError, EOFError) as exc:
        raise ParseError(f"{path}: cannot read: {exc}") from exc
    finally:
        src.close()
