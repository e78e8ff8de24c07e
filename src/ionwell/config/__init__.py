"""Campaign and engine settings: pydantic models; loading, validation, freezing, JSON Schema."""
