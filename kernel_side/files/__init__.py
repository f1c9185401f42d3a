"""The posterior file format: safetensors for tensors, JSON for metadata, atomic writes."""
