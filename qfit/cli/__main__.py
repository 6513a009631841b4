from qfit.cli.main import run_as_program

run_as_program()
