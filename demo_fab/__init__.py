"""The invented demo fab "Harrow Creek Devices": generator, injected faults with ground truth, exports.

Public entry: ``generate_demo(out_dir, days=60, seed=7) -> DemoSummary``.
"""

from demo_fab.demo import DemoSummary, generate_demo

__all__ = ["DemoSummary", "generate_demo"]
