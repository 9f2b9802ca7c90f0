"""``python -m orbify.cli``: the command line as a module, for launchers such as ``torchrun -m orbify.cli``."""

from orbify.cli import main

if __name__ == "__main__":
    main()
