"""What is made once a scan is complete: quick-look images, vector field, sheet moment,
report; written beside the store and remade any time (``strayline products``)."""

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
    "REPORT_JSON",
    "REPORT_MD",
    "VECTOR_ZARR",
    "ProductFile",
    "ProductsReport",
    "SkippedProduct",
    "make_products",
    "products_dir",
    "remake_products",
]
