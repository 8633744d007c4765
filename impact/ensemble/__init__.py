"""The ensemble stage: random streams, parameter draws, observation models, calibration, plausible draws."""
