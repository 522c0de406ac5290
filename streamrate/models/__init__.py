"""Model families. Each file holds one family; all follow :class:`streamrate.models.base.Model`."""
