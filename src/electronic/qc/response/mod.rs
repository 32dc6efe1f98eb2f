//! Spin-flip response: collinear SF-TDA and MRSF-TDDFT (being written).
