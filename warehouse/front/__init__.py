"""The front ends: the command line, the interactive shell and the resident process. They
depend on the commands; nothing below imports them."""
