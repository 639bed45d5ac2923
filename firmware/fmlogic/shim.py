# Stand-ins for MicroPython's own names, so the same files run under CPython (the host
# imports them): the micropython module's code emitters and const, and the pointer casts
# viper provides inside its functions.  A board and the unix port have the real ones and
# never import this file.


def const(x):
    return x


class micropython:  # noqa: N801 - stands in for the module
    @staticmethod
    def viper(f):
        return f

    @staticmethod
    def native(f):
        return f


def ptr8(x):
    return x


def ptr16(x):
    return x


def ptr32(x):
    return x
