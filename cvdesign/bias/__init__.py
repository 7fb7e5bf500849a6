"""What to bias with: bias-parameter hints (:mod:`.hints`) and funnel restraints
(:mod:`.funnel`). Import names from the modules (each has its own ``CAUTION``)."""
