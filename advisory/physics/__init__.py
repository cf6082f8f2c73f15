"""Pure, vectorised physics: sun, moisture, radiation, heat. No I/O."""
