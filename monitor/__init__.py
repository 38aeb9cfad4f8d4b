"""lotwarden: screens each lot's mean fill against its target and raises holds, unattended."""

__version__ = "0.1.0"
