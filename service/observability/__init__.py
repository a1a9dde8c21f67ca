"""Operations: structured logs (JSON lines), Prometheus metrics and the health endpoint."""
