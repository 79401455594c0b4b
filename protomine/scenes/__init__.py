"""The demo scenario renderer: SDF shapes, sphere tracing, sensor noise, scenario generation with truth files."""
