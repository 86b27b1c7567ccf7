"""The streaming runtime: one record's way through the service.

receive (transports) -> validate and step (processor, streams) -> publish ->
checkpoint (state) -> commit; alerts, metrics and the health endpoint beside
it. Nothing here imports the analysts' commands or the benchmark.
"""
