"""Back-office services for Kestrune Cycleshare in Brindlemoor.

Sub-modules cover dock telemetry, fleet rebalancing, rider billing and
maintenance tickets, plus shared configuration, logging and upload helpers.
"""

__version__ = "3.4.1"

SERVICE_NAME = "kestrune-backoffice"
