"""What is made once a scan is complete: quick-look images, vector field, sheet moment,
report; written beside the store and remade any time (``strayline products``). While a
scan runs, its live picture (:class:`LivePicture`) goes to the same folder."""

from strayline.products._report import status_fractions
from strayline.products.live import LIVE_PREFIX, LivePicture, live_image_name
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
    "LivePicture",
    "ProductFile",
    "ProductsReport",
    "SkippedProduct",
    "live_image_name",
    "make_products",
    "products_dir",
    "remake_products",
    "status_fractions",
]
