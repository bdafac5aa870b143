"""Open a RINEX file of any usual packing as a stream of text lines (the one I/O helper here).

The parsers themselves are line-fed and sans-IO; this module is the convenience layer that turns a
path into lines for them. The packing is recognised from the content, not the file name:

* gzip (``1f 8b``) and bzip2 (``BZh``): streamed through the standard library decompressors.
* Unix ``compress`` (``1f 9d``, old ``.Z`` archives): ``ncompress`` (a dependency of ``hatanaka``)
  only decompresses whole buffers, so the *compressed and the decompressed* file are held in memory.
* Hatanaka Compact RINEX (first line labelled ``CRINEX VERS   / TYPE``, RNXCMP format): streamed
  through the ``crx2rnx`` executable that ships inside the ``hatanaka`` package (``hatanaka``'s
  own API only takes whole buffers). A packed ``.crx.gz``/``.crx.bz2`` is unpacked by a child
  Python process piped into crx2rnx, so memory stays bounded by the pipe buffers. If the
  executable is missing we fall back to ``hatanaka.crx2rnx`` on the whole content: then the full
  decompressed file is in memory (about 3–4× the .crx size; roughly 0.5–1 GB for a 24 h 1 Hz
  multi-GNSS file).

Lines are decoded as Latin-1 so that stray non-ASCII bytes in comments never stop a replay.
"""

from __future__ import annotations

import bz2
import gzip
import io
import subprocess
import sys
import tempfile
from contextlib import contextmanager
from importlib import resources
from typing import IO, TYPE_CHECKING, cast

from ._errors import ParseError

if TYPE_CHECKING:
    from collections.abc import Generator, Iterator
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


def _packing(path: str | PathLike[str]) -> str:
    """ "gz", "bz2", "Z" or "" (plain), from the first bytes of the file."""
    with open(path, "rb") as f:
        magic = f.read(3)
    if magic[:2] == b"\x1f\x8b":
        return "gz"
    if magic == b"BZh":
        return "bz2"
    if magic[:2] == b"\x1f\x9d":
        return "Z"
    return ""


def _open_binary(path: str | PathLike[str]) -> IO[bytes]:
    """The file, decompressed if it is gzip/bzip2/compress (by magic bytes), positioned at 0."""
    packing = _packing(path)
    if packing == "gz":
        return cast("IO[bytes]", gzip.open(path, "rb"))
    if packing == "bz2":
        return cast("IO[bytes]", bz2.open(path, "rb"))
    if packing == "Z":
        import ncompress  # type: ignore[import-untyped, unused-ignore]  # noqa: PLC0415

        with open(path, "rb") as f:
            return io.BytesIO(ncompress.decompress(f.read()))
    return open(path, "rb")


#: Decompressor run as a child process that pipes Compact RINEX into crx2rnx, so that both stages
#: stream without a helper thread in this package (STYLE rule 3 keeps threads out of parsers/).
#: Standard library only (same magic bytes as :func:`_packing`) so that it starts in ~20 ms.
_UNPACK_SCRIPT = """\
import bz2, gzip, io, shutil, sys
path = sys.argv[1]
with open(path, "rb") as f:
    magic = f.read(3)
if magic[:2] == b"\\x1f\\x8b":
    src = gzip.open(path, "rb")
elif magic == b"BZh":
    src = bz2.open(path, "rb")
else:
    import ncompress
    with open(path, "rb") as f:
        src = io.BytesIO(ncompress.decompress(f.read()))
try:
    with src:
        shutil.copyfileobj(src, sys.stdout.buffer, 1 << 16)
    sys.stdout.flush()
except BrokenPipeError:
    sys.exit(0)  # the reader stopped early
"""


def _hatanaka_lines(path: str, packing: str) -> Generator[str, None, None]:
    exe = _crx2rnx_path()
    if exe is None:  # documented fallback: the whole decompressed file in memory
        import hatanaka  # noqa: PLC0415

        with _open_binary(path) as src:
            try:
                text = hatanaka.crx2rnx(src.read())
            except hatanaka.HatanakaException as exc:
                raise ParseError(f"{path}: Hatanaka decompression failed: {exc}") from exc
        yield from io.StringIO(text.decode(_ENCODING))
        return
    with tempfile.TemporaryFile() as err:
        unpack: subprocess.Popen[bytes] | None = None
        if packing:
            unpack = subprocess.Popen(  # noqa: S603 - our own interpreter and script
                [sys.executable, "-c", _UNPACK_SCRIPT, path],
                stdout=subprocess.PIPE,
                stderr=subprocess.DEVNULL,
            )
            assert unpack.stdout is not None
            stdin: IO[bytes] = unpack.stdout
        else:
            stdin = open(path, "rb")  # noqa: SIM115 - closed right after the child inherits it
        try:
            proc = subprocess.Popen(  # noqa: S603 - fixed executable from the hatanaka package
                [exe, "-"], stdin=stdin, stdout=subprocess.PIPE, stderr=err
            )
        finally:
            stdin.close()  # the child holds its own descriptor
        assert proc.stdout is not None
        text = io.TextIOWrapper(proc.stdout, encoding=_ENCODING, newline="")
        finished = False
        try:
            yield from text
            finished = True
        finally:
            for child in (proc, unpack):
                if child is not None and not finished and child.poll() is None:
                    child.kill()
            text.close()
            code = proc.wait()
            unpack_code = unpack.wait() if unpack is not None else 0
        if code not in _CRX2RNX_OK:
            err.seek(0)
            msg = err.read().decode(_ENCODING, "replace").strip().splitlines()
            reason = msg[0] if msg else f"exit code {code}"
            raise ParseError(f"{path}: Hatanaka decompression failed: {reason}")
        if unpack_code != 0:
            raise ParseError(f"{path}: {packing} decompression failed (exit code {unpack_code})")


@contextmanager
def open_rinex_text(path: str | PathLike[str]) -> Iterator[Iterator[str]]:
    """Context manager yielding the lines (with newlines) of a plain or packed RINEX file."""
    try:
        src = _open_binary(path)
    except OSError as exc:
        raise ParseError(f"{path}: cannot read: {exc}") from exc
    try:
        first = src.readline(256).decode(_ENCODING)
        if first[60:80].strip() == _CRINEX_LABEL.strip():
            src.close()
            lines = _hatanaka_lines(str(path), _packing(path))
            try:
                yield lines
            finally:
                lines.close()  # stops crx2rnx if the reader left early
        else:
            src.seek(0)
            text = io.TextIOWrapper(src, encoding=_ENCODING, newline="")
            try:
                yield text
            finally:
                text.detach()  # src is closed below
    except (OSError, EOFError) as exc:
        raise ParseError(f"{path}: cannot read: {exc}") from exc
    finally:
        src.close()
