"""demo_stream: a synthetic scanning-NV instrument that writes scan-line files."""
