"""The writer's data path, one module per step.

``reader`` (read the event stream, claim, acknowledge) -> ``decide`` (what is
applied, dead-lettered or skipped) -> ``apply`` (the step replicas share) ->
``applied_log`` (what replicas follow) -> ``checkpoints`` (cadence, save, ack
after durable, trim); ``writer`` wires them.
"""
