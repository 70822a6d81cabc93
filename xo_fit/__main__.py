from xo_fit.cli.app import run

run()
