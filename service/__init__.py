"""casecloud's asyncio service: transports, stream registry, checkpoints,
alerts, metrics and the command line."""
