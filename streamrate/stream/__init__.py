"""The writer's data path, step by step: apply, the applied log, checkpoint loading."""
