* wxshock from Stata: merge season shocks onto a person-year panel.
*
* First fetch the shocks as a Stata file, from a shell (any number of communities, as a batch job):
*   wxshock submit --server http://127.0.0.1:8000 --request request.json --features communities.geojson --out shocks.dta
* or, for up to 200 communities on demand:
*   curl -s -X POST 'http://127.0.0.1:8000/v1/indicators?format=dta' -H 'Content-Type: application/json' \
*        --data @request_with_features.json -o shocks.dta
*
* shocks.dta has one row per community (feature_id, a string) and season-year (year, an integer);
* every variable is labelled, class variables carry value labels (much drier ... much wetter), missing
* values are Stata missing (.), and `notes` holds the codes of the row's warnings.

use shocks.dta, clear
describe prcp_total*
label list prcp_total_class
tab prcp_total_class if year >= 2000
tempfile shocks
save `shocks'

use panel.dta, clear                     // person-year panel with feature_id (string) and year
merge m:1 feature_id year using `shocks', keep(master match)
tab _merge
