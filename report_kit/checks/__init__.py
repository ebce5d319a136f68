"""Checks of the trial itself: covariate balance, participant flow, attrition and bounds."""
