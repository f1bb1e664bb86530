"""Fetch an open_clip model's weights from the Hugging Face hub once, verified.

Used by ``auto`` (when nothing is on disk and the hub answers) and by
``explore fetch-model`` (ahead of time, to copy to an offline machine). The
file goes into the Hugging Face cache (``HF_HOME`` / ``HF_HUB_CACHE``), where
``clip.find_local_weights`` finds it later without any network call.

Verification: the size the hub announces (``X-Linked-Size`` / Content-Length)
and, for files stored with Git LFS, the sha256 the hub publishes as the file's
ETag (``X-Linked-Etag``; huggingface_hub docs, "File metadata"), recomputed
over the downloaded bytes. A file that fails is deleted and reported.
"""

from __future__ import annotations

import hashlib
import os
import re
import sys
from dataclasses import dataclass
from pathlib import Path

from explore.encoders.base import EncoderUnavailable
from explore.encoders.clip import (
    _HF_SAFE_WEIGHTS_NAME,
    _HF_WEIGHTS_NAME,
    _hf_cache_dir,
    hub_offline,
    pretrained_cfg,
)

#: Seconds allowed for the hub's metadata answer before giving up on a download.
METADATA_TIMEOUT = 3.0


def hub_endpoint() -> str:
    """The hub the client talks to: ``HF_ENDPOINT`` (read now, not at import), else huggingface.co."""
    return (os.environ.get("HF_ENDPOINT") or "https://huggingface.co").rstrip("/")


@dataclass
class Fetched:
    """A verified weights file in the Hugging Face cache."""

    path: Path
    size: int
    sha256: str
    #: True when the hub published a sha256 and it matched (else only the size was checked).
    hash_checked: bool
    url: str
    repo_id: str
    filename: str

    def describe(self) -> str:
        check = "size and sha256 checked" if self.hash_checked else "size checked (the hub published no sha256)"
        return f"{self.path} ({self.size / 1e6:.0f} MB, sha256 {self.sha256[:16]}..., {check})"


def weight_files(model: str, pretrained: str) -> tuple[str, list[str]]:
    """(hub repo, candidate file names in the order open_clip tries them) for a model and tag."""
    cfg = pretrained_cfg(model, pretrained)
    hf_hub = cfg.get("hf_hub") or ""
    if not hf_hub:
        why = "open_clip knows no such tag" if not cfg else "its weights are not on the Hugging Face hub"
        raise EncoderUnavailable(f"cannot fetch {model} / {pretrained}: {why}")
    repo_id, filename = os.path.split(hf_hub)  # as open_clip.pretrained.download_pretrained_from_hf
    filename = filename or _HF_WEIGHTS_NAME
    if filename == _HF_WEIGHTS_NAME:
        names = [_HF_SAFE_WEIGHTS_NAME, filename]  # open_clip prefers the safetensors twin
    elif filename.endswith((".bin", ".pth")):
        names = [filename[:-4] + ".safetensors", filename]
    else:
        names = [filename]
    return repo_id, names


def _progress_class(stream):
    """A tqdm class that always shows bytes, rate and time left on ``stream`` (None: no bar)."""
    from tqdm.auto import tqdm

    class Bar(tqdm):
        def __init__(self, *args, **kwargs):
            kwargs.pop("name", None)
            kwargs["disable"] = stream is None
            kwargs["file"] = stream
            kwargs.setdefault("unit", "B")
            kwargs.setdefault("unit_scale", True)
            kwargs.setdefault("unit_divisor", 1024)
            kwargs["bar_format"] = "{desc}: {percentage:3.0f}%|{bar}| {n_fmt}B/{total_fmt}B [{elapsed}<{remaining}, {rate_fmt}]"
            super().__init__(*args, **kwargs)

    return Bar


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            digest.update(block)
    return digest.hexdigest()


def fetch_weights(
    model: str,
    pretrained: str,
    *,
    progress=sys.stderr,
    timeout: float = METADATA_TIMEOUT,
) -> Fetched:
    """Download ``model`` / ``pretrained``'s weights into the Hugging Face cache and verify them.

    Parameters
    ----------
    model, pretrained : open_clip model name and pretrained tag.
    progress : stream for the progress bar (bytes, rate, time left); None for none.
    timeout : seconds for the hub's metadata answer.

    Raises
    ------
    EncoderUnavailable : offline, no such file on the hub, or verification failed.
    """
    if hub_offline():
        raise EncoderUnavailable("cannot fetch weights: HF_HUB_OFFLINE is set")
    from huggingface_hub import get_hf_file_metadata, hf_hub_download, hf_hub_url
    from huggingface_hub.errors import HfHubHTTPError

    endpoint = hub_endpoint()
    repo_id, names = weight_files(model, pretrained)
    cache_dir = str(_hf_cache_dir())
    problems = []
    for filename in names:
        url = hf_hub_url(repo_id, filename, endpoint=endpoint)
        try:
            meta = get_hf_file_metadata(url, timeout=timeout, endpoint=endpoint)
        except HfHubHTTPError as exc:
            status = getattr(getattr(exc, "response", None), "status_code", None)
            problems.append(f"{url}: HTTP {status}")
            if status == 404:
                continue
            raise EncoderUnavailable(f"cannot fetch {model} / {pretrained}: {url} answered HTTP {status}") from exc
        except Exception as exc:  # connection refused, timeout, DNS
            raise EncoderUnavailable(f"cannot fetch {model} / {pretrained}: {url}: {exc}") from exc
        try:
            path = Path(
                hf_hub_download(
                    repo_id,
                    filename,
                    cache_dir=cache_dir,
                    endpoint=endpoint,
                    etag_timeout=timeout,
                    tqdm_class=_progress_class(progress),
                )
            )
        except Exception as exc:
            raise EncoderUnavailable(f"download of {url} failed: {exc}") from exc
        size = path.stat().st_size
        digest = _sha256(path)
        etag = (meta.etag or "").strip('"').lower()
        published = bool(re.fullmatch(r"[0-9a-f]{64}", etag))
        wrong = []
        if meta.size is not None and size != meta.size:
            wrong.append(f"size {size} bytes, the hub announced {meta.size}")
        if published and digest != etag:
            wrong.append(f"sha256 {digest}, the hub published {etag}")
        if wrong:
            for item in {path, path.resolve()}:
                try:
                    item.unlink()
                except OSError:
                    pass
            raise EncoderUnavailable(f"download of {url} failed verification ({'; '.join(wrong)}); the file was deleted")
        return Fetched(path, size, digest, published, url, repo_id, filename)
    raise EncoderUnavailable(f"cannot fetch {model} / {pretrained}: no weights file on the hub ({'; '.join(problems)})")
