"""The checkpoint's own metadata: query id, logs, sources, operators, stores, versions."""
