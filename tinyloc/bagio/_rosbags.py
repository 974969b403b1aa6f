"""Lazy access to the optional ``rosbags`` package, with a one-line error when it is missing."""

from __future__ import annotations

from ..errors import InputError

MISSING = "reading or writing bag files needs the optional 'rosbags' package: pip install 'tinyloc[bag]'"


def rosbags():
    """Import and return the ``rosbags`` submodules we use (a namespace object).

    Raises
    ------
    InputError
        If ``rosbags`` is not installed (one line saying how to install it).
    """
    try:
        from rosbags import highlevel, rosbag1, rosbag2, serde, typesys
    except ImportError:
        raise InputError(MISSING) from None
    return _NS(highlevel=highlevel, rosbag1=rosbag1, rosbag2=rosbag2, serde=serde, typesys=typesys)


class _NS:
    def __init__(self, **kw):
        self.__dict__.update(kw)


def typestore(ros1: bool = False):
    """The message-definition store used when a bag carries no definitions of its own."""
    rb = rosbags()
    st = rb.typesys.Stores.ROS1_NOETIC if ros1 else rb.typesys.Stores.ROS2_HUMBLE
    return rb.typesys.get_typestore(st)


def stamp_ns(header) -> int:
    """Header stamp as integer nanoseconds (0 when the publisher left it unset)."""
    return int(header.stamp.sec) * 1_000_000_000 + int(header.stamp.nanosec)
