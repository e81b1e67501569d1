"""Input shells: real logs in, written as frame-log format v1 through tracelab.format.

    options.py    --bus / --meta / size option values shared by both commands
    convert.py    streaming, vectorised delimited table -> format v1 (``tracelab convert``)
    socketcan.py  kernel structure layouts, flag bits, error-frame meaning, ancillary data
    links.py      an interface's bit rates as the system reports them (``ip -details -json``)
    rotation.py   the parts of one capture run: naming, headers, interval / size rotation
    capture.py    receive threads, the reorder window, the writer thread (``tracelab capture``)
"""
