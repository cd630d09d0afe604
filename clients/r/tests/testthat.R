library(testthat)
library(wxshock)

test_check("wxshock")
