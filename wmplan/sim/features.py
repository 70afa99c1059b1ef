"""The one place where the feature layouts of vehicles, object lists and road context are defined.

Vehicle rows (world frame in the simulator and the oracle; ego frame in object lists):

| idx | name         | unit | range (object list, ego frame)       | meaning                                   |
|-----|--------------|------|--------------------------------------|-------------------------------------------|
| 0   | x_m          | m    | about [-window_behind, window_ahead] | centre position along the road / ahead    |
| 1   | y_m          | m    | [-road width, road width]            | centre position across the road / to left |
| 2   | vx_mps       | m/s  | [0, 60] world; [-60, 60] ego frame    | velocity along x                          |
| 3   | vy_mps       | m/s  | [-10, 10]                            | velocity along y                          |
| 4   | heading_rad  | rad  | (-pi, pi]                            | yaw angle (relative to the ego's)         |
| 5   | length_m     | m    | [2, 25]                              | footprint length                          |
| 6   | width_m      | m    | [1, 3]                               | footprint width                           |
| 7   | valid        | 1    | {0, 1}                               | 1 where the row holds a vehicle           |

Row 0 of an object list is the ego itself (at the origin, heading 0); rows 1..M are the M nearest other
vehicles by centre distance, nearest first; empty rows are all zero.

Road context of the ego (object lists carry it beside the rows):

| idx | name                  | unit | range        | meaning                                               |
|-----|-----------------------|------|--------------|-------------------------------------------------------|
| 0   | lane_offset_m         | m    | [-w/2, w/2]+ | ego centre minus the centre of its lane (to the left) |
| 1   | lane_end_m            | m    | [0, 500]     | distance to where the ego's lane ends, capped at 500  |
| 2   | lanes_left            | 1    | [0, 5]       | lanes that exist to the left at the ego's position    |
| 3   | lanes_right           | 1    | [0, 5]       | lanes that exist to the right                         |
| 4   | right_lane_end_m      | m    | [0, 500]     | distance to the end of the lane to the right (0: none)|
| 5   | left_lane_end_m       | m    | [0, 500]     | distance to the end of the lane to the left (0: none) |

Actions of the ego: ``(accel_mps2, steer_rad)``, longitudinal acceleration and front-wheel steering angle.
"""

from __future__ import annotations

VEHICLE_FEATURES = ("x_m", "y_m", "vx_mps", "vy_mps", "heading_rad", "length_m", "width_m", "valid")
VEHICLE_UNITS = ("m", "m", "m/s", "m/s", "rad", "m", "m", "1")
F_X, F_Y, F_VX, F_VY, F_HEADING, F_LENGTH, F_WIDTH, F_VALID = range(len(VEHICLE_FEATURES))
NUM_VEHICLE_FEATURES = len(VEHICLE_FEATURES)

ROAD_FEATURES = ("lane_offset_m", "lane_end_m", "lanes_left", "lanes_right", "right_lane_end_m", "left_lane_end_m")
ROAD_UNITS = ("m", "m", "1", "1", "m", "m")
NUM_ROAD_FEATURES = len(ROAD_FEATURES)
LANE_END_CAP_M = 500.0

ACTION_NAMES = ("accel_mps2", "steer_rad")
ACTION_UNITS = ("m/s^2", "rad")
ACTION_DIM = len(ACTION_NAMES)

DEFAULT_NUM_OBJECTS = 8
