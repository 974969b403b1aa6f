"""Robot logs in and out: ROS bag files (ROS 1 ``.bag``, ROS 2 sqlite3 / MCAP) <-> run folders.

Reading and writing bags goes through the optional pure-Python ``rosbags`` package
(``pip install 'tinyloc[bag]'``); it is imported only when a bag is touched, so the
robot install does not need it. See docs/bags.md.
"""
