"""LOINC codes of the trade: the one place each is written (site TOML files keep their own literal
codes: that is configuration). Each with its LOINC long name and where that was checked:
  [VULCAN]  code and long name as in HL7/Vulcan-schedule-ig,
            input/fsh/observationdefinitions/LOINC-<code>-ObservationDefinition.fsh (checked)
  [REFS]    verified as recorded in docs/references.md (a LOINC table checked against the OHDSI
            vocabulary); not re-checked here
Sites confirm each against their own catalogue; troponin codes vary by assay and stay in site config.
"""

LOINC_POTASSIUM_SERUM = "2823-3"     # Potassium [Moles/volume] in Serum or Plasma           [VULCAN]
LOINC_POTASSIUM_BLOOD = "6298-4"     # Potassium [Moles/volume] in Blood                     [REFS]
LOINC_MAGNESIUM_MASS = "19123-9"     # Magnesium [Mass/volume] in Serum or Plasma            [VULCAN]
LOINC_MAGNESIUM_MOLAR = "2601-3"     # Magnesium [Moles/volume] in Serum or Plasma           [REFS]
LOINC_CALCIUM_MASS = "17861-6"       # Calcium [Mass/volume] in Serum or Plasma              [VULCAN]
LOINC_CALCIUM_MOLAR = "2000-8"       # Calcium [Moles/volume] in Serum or Plasma             [REFS]
LOINC_TROPONIN_I_HS = "89579-7"      # Troponin I.cardiac [Mass/volume] in Serum or Plasma
                                     # by High sensitivity method                            [REFS]
LOINC_SODIUM = "2951-2"              # Sodium [Moles/volume] in Serum or Plasma              [VULCAN]
LOINC_CREATININE = "2160-0"          # Creatinine [Mass/volume] in Serum or Plasma           [VULCAN]
LOINC_GLUCOSE = "2345-7"             # Glucose [Mass/volume] in Serum or Plasma              [VULCAN]
LOINC_HAEMOGLOBIN = "718-7"          # Hemoglobin [Mass/volume] in Blood                     [VULCAN]
