"""lethe: an on-device agent for experience-sampling memory studies.

Raw sensor drops arrive in a local inbox; only coarse codes are kept, the
originals are destroyed within the policy's retention window, and only
encrypted, signed aggregates leave the device.
"""

__version__ = "0.1.0"
