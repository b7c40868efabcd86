"""Bringing up a new bike: check a rig file against a short recording and suggest its values."""

from crankbeat.logger.bringup.check import IdRate, RigCheck, check_rig

__all__ = ["IdRate", "RigCheck", "check_rig"]
