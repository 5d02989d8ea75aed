"""The emulated air: multipath profiles, fading and the channel simulator."""
