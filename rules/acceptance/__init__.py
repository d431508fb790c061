"""The acceptance rules, one module per area; ``calwarden.rules.registry.RULES`` lists them all."""
