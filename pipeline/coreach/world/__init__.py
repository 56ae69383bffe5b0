"""The world the arm moves in: scenes and their bodies, URDF arms and their link models, placement and reach."""
