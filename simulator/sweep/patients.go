package sweep

import "trapline/simulator"

// patient maps a model and nominal R, C (scaled by rf and cf) to the
// simulator's patient.
func patient(model string, r, c, rf, cf float64) simulator.Patient {
	r, c = r*rf, c*cf
	p := simulator.NewScenario().Patient
	p.ResistanceCmH2OSPerL, p.ComplianceMLPerCmH2O = r, c
	p.ExpResistanceCmH2OSPerL, p.ExpK2CmH2OS2PerL2 = r, 0
	switch model {
	case ModelRohrer:
		// K1 + K2·|V'| = R at the reference flow, half of it linear.
		p.ResistanceCmH2OSPerL, p.K2CmH2OS2PerL2 = r/2, r/2/RohrerRefFlowLPS
		p.ExpResistanceCmH2OSPerL, p.ExpK2CmH2OS2PerL2 = r/2, r/2/RohrerRefFlowLPS
	case ModelTwoCompartment, ModelTwoCompartment3, ModelTwoCompartment10:
		// Shared 0.4·R, units k·R and q·k·R in parallel (0.6·R): R in all,
		// time constants of the units differ q-fold (Otis et al. 1956);
		// 1/k + 1/(q·k) = 1/0.6 gives k = 0.6·(1 + 1/q).
		q := map[string]float64{ModelTwoCompartment: 4, ModelTwoCompartment3: 3, ModelTwoCompartment10: 10}[model]
		k := 0.6 * (1 + 1/q)
		p.Model = simulator.ModelTwoCompartment
		p.AirwayResistanceCmH2OSPerL = 0.4 * r
		p.ResistanceCmH2OSPerL, p.Resistance2CmH2OSPerL = k*r, q*k*r
		p.ExpResistanceCmH2OSPerL = k * r
		p.ComplianceMLPerCmH2O, p.Compliance2MLPerCmH2O = c/2, c/2
	case ModelFlowLimited:
		p.FlowLimitLPS, p.FlowLimitSlopePerS = FlowLimitLPS, FlowLimitSlopePerS
	case ModelEffort:
		p.EffortCmH2O = EffortCmH2O
	}
	return p
}

// patientKeys lists the mechanics of p as timeline keys.
func patientKeys(p simulator.Patient) map[string]float64 {
	m := map[string]float64{
		"resistance_cmh2o_s_per_l":     p.ResistanceCmH2OSPerL,
		"compliance_ml_per_cmh2o":      p.ComplianceMLPerCmH2O,
		"exp_resistance_cmh2o_s_per_l": p.ExpResistanceCmH2OSPerL,
	}
	if p.K2CmH2OS2PerL2 > 0 {
		m["k2_cmh2o_s2_per_l2"] = p.K2CmH2OS2PerL2
		m["exp_k2_cmh2o_s2_per_l2"] = p.ExpK2CmH2OS2PerL2
	}
	if p.Model == simulator.ModelTwoCompartment {
		m["resistance_2_cmh2o_s_per_l"] = p.Resistance2CmH2OSPerL
		m["compliance_2_ml_per_cmh2o"] = p.Compliance2MLPerCmH2O
		m["airway_resistance_cmh2o_s_per_l"] = p.AirwayResistanceCmH2OSPerL
	}
	return m
}
