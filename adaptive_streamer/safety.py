# SPDX-License-Identifier: Apache-2.0
"""Safety cautions printed by the demo and the bring-up (the README carries the same text)."""

CAUTIONS = """\
SAFETY - read before connecting a real robot:
  * This software's stop is NOT a safety function. Keep a certified emergency stop and a
    safety controller in the cell, independent of this software.
  * Do a risk assessment for the cell (ISO 10218-1/-2; ISO/TS 15066 for collaborative use).
  * Commission at reduced speed (adapter limit_scale, reference speed_override) with the
    cell clear of people, and raise speed only after the behaviour is verified.
  * Local codes and the integrator's licensed practice take precedence over this software."""
