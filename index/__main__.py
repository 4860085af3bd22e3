import sys

try:
    from .cli.commands import main
except KeyboardInterrupt:  # Ctrl-C while the libraries load: nothing has been touched yet
    sys.exit(130)

main(prog_name="kinscope")
