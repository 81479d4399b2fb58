"""What is made once a scan is complete: quick-look images, vector field, sheet moment
with its error bars, report; written beside the store and remade any time (``strayline
products``). While a scan runs, its live picture (:class:`LivePicture`) goes to the same
folder. Tip calibrations on a known structure (``strayline calibrate``) and line cuts
fitted with a wall model (``strayline cut``)."""

from strayline.products._report import status_fractions
from strayline.products.calibration import (
    CalibrationFit,
    CalibrationRecord,
    CalibrationUse,
    calibrate_store,
    calibrations_dir,
    find_calibration,
    keep_calibration,
    read_calibration,
    use_calibration,
    write_calibration,
)
from strayline.products.cut import CutProduct, cut_store
from strayline.products.live import LIVE_PREFIX, LivePicture, draw_live_picture, live_image_name
from strayline.products.make import (
    REPORT_JSON,
    REPORT_MD,
    VECTOR_ZARR,
    ProductFile,
    ProductsReport,
    SkippedProduct,
    make_products,
    products_dir,
    remake_products,
)

__all__ = [
    "LIVE_PREFIX",
    "REPORT_JSON",
    "REPORT_MD",
    "VECTOR_ZARR",
    "CalibrationFit",
    "CalibrationRecord",
    "CalibrationUse",
    "CutProduct",
    "LivePicture",
    "ProductFile",
    "ProductsReport",
    "SkippedProduct",
    "calibrate_store",
    "calibrations_dir",
    "cut_store",
    "draw_live_picture",
    "find_calibration",
    "keep_calibration",
    "live_image_name",
    "make_products",
    "products_dir",
    "read_calibration",
    "remake_products",
    "status_fractions",
    "use_calibration",
    "write_calibration",
]
