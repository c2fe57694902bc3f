"""Running a study: the Flower ServerApp, evaluation rounds and the engines that carry them."""
