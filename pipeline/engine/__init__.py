"""The engine: from a source listing to committed versions (``sync``), what every writer does
first after a crash (``recovery``), and what a sync reports (``reports``)."""
