"""Culture vessels (plates, dishes, flasks) and the map from vessel to stage coordinates."""

from daemon.vessels.geometry import Vessel, VesselError, Well, get_vessel, load_vessels, parse_wells
from daemon.vessels.stage_map import StageMap, fit_stage_map, load_stage_map, save_stage_map

__all__ = [
    "StageMap", "Vessel", "VesselError", "Well", "fit_stage_map", "get_vessel",
    "load_stage_map", "load_vessels", "parse_wells", "save_stage_map",
]
