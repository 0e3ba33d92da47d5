from adapt.cli.main import run_as_process

run_as_process()
