"""Field from a reversed phase-encode EPI pair (Chang & Fitzpatrick 1992 model)."""
