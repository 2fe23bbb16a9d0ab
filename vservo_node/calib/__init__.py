"""Cell geometry from data: hand-eye calibration (``handeye``), samples from images, bags and
the simulated cell (``samples``), the check of a configured hand-eye from a recorded run
(``check``) and the loop delay (``delay``). Functional core: no rclpy here."""
