"""The analysts' commands: demo, calibrate, backtest, scenario and report.

They compose the numerical core (filters) with the runtime where they replay
data through the real service path; the runtime never imports them.
"""
