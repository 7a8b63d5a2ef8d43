//! Float model import (being written).
