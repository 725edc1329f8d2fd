"""pipeline.packets (see DEVELOPERS.md, stage contracts)."""

__all__: list[str] = []
