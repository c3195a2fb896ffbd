"""The engineer's workbench: historian files, backtest, tune, report, replay/record/watch, demo."""
