"""The decision stage: what the choice hinges on (drivers, value of information, the prior screen)."""
