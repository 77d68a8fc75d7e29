# SPDX-License-Identifier: Apache-2.0
"""The demo: an invented bead-dispensing cell run end to end over real DDS, with a report."""
