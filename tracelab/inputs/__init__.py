"""Input shells: real logs in, written as frame-log format v1 through tracelab.format.

    options.py    --bus / --meta / size option values shared by the input commands
    convert.py    streaming, vectorised delimited table -> format v1 (``tracelab convert``)
"""
