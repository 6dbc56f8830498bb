"""``upwell watch``: the daemon (``daemon``), from file events to work (``watching``), the HTTP
API (``api``), its metrics (``metrics``) and log lines (``logs``)."""
