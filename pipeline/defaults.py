"""Every default upwell ships with, in one place. The configuration file (``pipeline.config``)
and the command line override them; the code below them takes its defaults from here."""

from __future__ import annotations

#: The index folder when neither --index nor $UPWELL_INDEX names one.
INDEX_FOLDER = ".upwell"
#: The embedder spec of a new index: the bundled all-MiniLM-L6-v2 int8 ONNX model.
MODEL = "default"
#: Where connectors keep what they remember between runs, inside the index folder.
CONNECTOR_STATE_FOLDER = "connector-state"
OCR_CACHE_FOLDER = "ocr-cache"  # OCR results by page-image hash, beside the connector state
#: Documents per commit of ``upwell sync``: bounds the memory and the work one commit holds.
BATCH_DOCUMENTS = 200
#: Documents per commit in the service: smaller, so a stop waits for less.
SERVICE_BATCH_DOCUMENTS = 50
#: A sync that would remove more than this share of a source asks first.
MAX_REMOVAL_FRACTION = 0.5
#: Maintenance keeps versions this many days (tagged versions always).
KEEP_DAYS = 30.0
