"""pipelines layer."""
