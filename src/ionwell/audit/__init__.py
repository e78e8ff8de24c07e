"""Read-only views of a campaign folder: where it stands (status) and replay of its decisions."""
