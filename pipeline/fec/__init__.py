"""pipeline.fec (see DEVELOPERS.md, stage contracts)."""

__all__: list[str] = []
