"""The Lab Streaming Layer bridge: LSL streams republished on placeloop's wire protocol."""
