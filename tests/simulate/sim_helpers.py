"""Helpers shared by the simulator tests."""

import dataclasses


def small_chip(config, **readout):
    """The config on a 120 x 120 pixel chip (faster scratch arrays), with readout overrides."""
    return dataclasses.replace(config, readout=dataclasses.replace(config.readout, n_columns=120, n_rows=120,
                                                                   **readout))
