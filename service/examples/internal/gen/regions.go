package gen

import (
	"fmt"

	"github.com/beliefd/beliefd/service/model"
)

// RegionsName is the name (and file name, plus ".json") of the generated model.
const RegionsName = "tarnwick-regions"

// Layout of the platform.
const (
	sitesPerRegion = 2
	rowsPerSite    = 3
	racksPerRow    = 4
	racksPerSite   = rowsPerSite * racksPerRow
	hostsPerRack   = 8
	arraysPerSite  = 2
	seed           = 0x7a2f_1c4e_9b03_d5e1
)

// regionNames are Tarnwick Freight's three (invented) regions.
var regionNames = []string{"north", "central", "south"}

// siteLetters name the two data halls of a region.
var siteLetters = []string{"a", "b"}

// hostRates are the hardware failure rates of hosts, in failures per
// million hours; each host gets one at random.
var hostRates = []int{5, 8, 10, 12, 15}

// deployRates are the chances (ppm) that a service's deploy in the window
// is bad; each regional service gets one at random.
var deployRates = []int{3000, 5000, 8000, 10000}

// database is one database cluster of a region: three nodes on hosts in
// different racks, a quorum of two.
type database struct {
	name, desc string
	migration  int // ppm chance of a bad schema migration in the window
}

var databases = []database{
	{"orders_db", "orders database cluster", 4000},
	{"tracking_db", "parcel tracking events database cluster", 2000},
	{"billing_db", "billing and invoicing database cluster", 3000},
	{"routing_db", "route and depot schedule database cluster", 3000},
	{"customer_db", "customer accounts database cluster", 2000},
	{"depot_db", "depot inventory database cluster", 5000},
}

// service is one service run in every region.
type service struct {
	name, desc string
	instances  int
	frontEnd   bool     // reached through the regional ingress, watched by a synthetic probe
	hard       []string // dependencies it cannot work without
	soft       []string // dependencies whose loss only degrades it
}

// services are in dependency order: a service depends only on databases
// and on services listed before it.
var services = []service{
	{name: "auth", desc: "sign-in and token service", instances: 6, hard: []string{"customer_db"}},
	{name: "event_bus", desc: "parcel event message bus", instances: 8},
	{name: "address_validation", desc: "address lookup and validation", instances: 6, soft: []string{"customer_db"}},
	{name: "pricing", desc: "shipping price quotes", instances: 6, hard: []string{"billing_db"}, soft: []string{"address_validation"}},
	{name: "route_planner", desc: "van route planning", instances: 6, hard: []string{"routing_db"}, soft: []string{"event_bus"}},
	{name: "label_service", desc: "shipping label generation", instances: 8, hard: []string{"orders_db", "pricing"}, soft: []string{"address_validation"}},
	{name: "checkout_api", desc: "parcel booking and checkout API", instances: 10, frontEnd: true, hard: []string{"orders_db", "auth"}, soft: []string{"pricing", "label_service", "billing_db"}},
	{name: "tracking_api", desc: "public parcel tracking API", instances: 10, frontEnd: true, hard: []string{"tracking_db"}, soft: []string{"event_bus", "auth"}},
	{name: "depot_gateway", desc: "gateway for depot hand-held scanners", instances: 8, frontEnd: true, hard: []string{"depot_db", "event_bus"}, soft: []string{"route_planner", "auth"}},
	{name: "notifications", desc: "delivery text and e-mail notifications", instances: 6, hard: []string{"event_bus"}, soft: []string{"tracking_db", "customer_db"}},
	{name: "customer_portal", desc: "customer web portal", instances: 6, frontEnd: true, hard: []string{"auth"}, soft: []string{"tracking_api", "checkout_api"}},
	{name: "billing_batch", desc: "nightly billing batch", instances: 4, hard: []string{"billing_db"}, soft: []string{"orders_db", "event_bus"}},
}

// function is a customer-facing function served from every region.
type function struct {
	name, desc, regional string
	external             []cause // causes outside the regions
}

// Regions generates the tarnwick-regions model document.
func Regions() ([]byte, error) {
	b := newBuilder()
	r := &splitmix64{s: seed}
	regional := map[string][]string{} // service -> its variable in each region
	for _, reg := range regionNames {
		buildRegion(b, r, reg, regional)
	}
	functions := buildGlobal(b, regional)
	if b.err != nil {
		return nil, fmt.Errorf("generate %s: %w", RegionsName, b.err)
	}
	if len(b.vars) == 0 {
		return nil, fmt.Errorf("generate %s: %w", RegionsName, errEmpty)
	}
	hosts := len(regionNames) * sitesPerRegion * racksPerSite * hostsPerRack
	desc := fmt.Sprintf("Invented example: the whole platform of Tarnwick Freight, a fictional parcel carrier, "+
		"over a 24-hour window: %d regions of %d data halls (power, cooling, network, storage), %d hosts in %d racks, "+
		"%d database clusters and %d services per region, %d customer-facing functions, and the alarms that watch them. "+
		"Far too large for exact inference: queries on it sample. All numbers are made up for demonstration.",
		len(regionNames), sitesPerRegion, hosts, len(regionNames)*sitesPerRegion*racksPerSite,
		len(databases), len(services), functions)
	return write(RegionsName, desc, b.vars)
}

// site holds the names of a data hall's shared variables.
type site struct {
	busA, busB, sitePower string
	coreNetwork, wan      string
	hotAisle              []string   // per row
	arrays                []string   // ok/degraded/down
	hosts                 [][]string // host down variables per rack
}

func buildRegion(b *builder, r *splitmix64, reg string, regional map[string][]string) {
	sites := make([]*site, sitesPerRegion)
	for i, l := range siteLetters {
		sites[i] = buildSite(b, r, reg+"_"+l)
	}

	// Region: interconnect between the halls, load balancers, ingress.
	dci := b.root(reg+"_dci", "Data-centre interconnect between the "+reg+" halls cut", []string{"ok", "cut"}, 1000)
	lb1 := b.root(reg+"_lb_1", "Load balancer 1 of the "+reg+" region", okFailed, 2000)
	lb2 := b.root(reg+"_lb_2", "Load balancer 2 of the "+reg+" region", okFailed, 2000)
	lbs := b.gate(reg+"_load_balancers", "Both load balancers of the "+reg+" region failed", okFailed, model.GateAllOf, 0, lb1, lb2)
	isolated := b.gate(reg+"_isolated", "Both halls of the "+reg+" region cut off from the internet", []string{"no", "yes"}, model.GateAllOf, 0, sites[0].wan, sites[1].wan)
	ingress := b.noisyOR(reg+"_ingress", "Customer traffic cannot reach the "+reg+" region", okLost, 50,
		link{lbs, million}, link{isolated, million}, link{sites[0].wan, 100_000}, link{sites[1].wan, 100_000})
	b.alarm("alarm_"+reg+"_ingress_probe", "External probe of the "+reg+" region's ingress", ingress, 1000, 10_000)
	b.alarm("alarm_"+reg+"_dci_loss", "Packet loss on the "+reg+" interconnect", dci, 2000, 20_000)

	// pick places n instances on hosts in distinct racks, alternately in
	// the two halls, starting with hall first.
	pick := func(n int, first int) []string {
		perSite := [sitesPerRegion]int{}
		for i := 0; i < n; i++ {
			perSite[(first+i)%sitesPerRegion]++
		}
		var hosts []string
		for s := 0; s < sitesPerRegion; s++ {
			for _, rk := range r.choose(racksPerSite, perSite[s]) {
				hosts = append(hosts, sites[s].hosts[rk][r.intn(hostsPerRack)])
			}
		}
		return hosts
	}

	// Databases.
	dbVar := map[string]string{}
	for i, db := range databases {
		name := reg + "_" + db.name
		nodes := pick(3, i%2)
		quorum := b.gate(name+"_quorum_lost", "Two of the three "+reg+" "+db.desc+" nodes down", []string{"no", "yes"}, model.GateKOfN, 2, nodes...)
		migration := b.root(name+"_bad_migration", "Bad schema migration on the "+reg+" "+db.desc, noYes, db.migration)
		primary := sites[i%2]
		causes := []cause{
			{quorum, []effect{{"yes", []int{0, 100_000, 900_000}}}},
			{primary.arrays[i%arraysPerSite], []effect{
				{"degraded", []int{300_000, 600_000, 100_000}},
				{"down", []int{50_000, 250_000, 700_000}}}},
			{migration, []effect{{"yes", []int{200_000, 600_000, 200_000}}}},
			{dci, []effect{{"cut", []int{600_000, 400_000, 0}}}},
		}
		for _, n := range nodes {
			causes = append(causes, cause{n, []effect{{"down", []int{600_000, 400_000, 0}}}})
		}
		v := b.noisyMAX(name, "The "+reg+" "+db.desc, threeLevel, []int{998_000, 1500, 500}, causes...)
		b.alarm3("alarm_"+name+"_replication_lag", "Replication lag on the "+reg+" "+db.desc, v, 10_000, 600_000, 100_000)
		b.alarm3("alarm_"+name+"_connection_errors", "Connection errors from the "+reg+" "+db.desc, v, 3000, 300_000, 20_000)
		dbVar[db.name] = v
	}

	// Services.
	svcVar := map[string]string{}
	dep := func(d string) string {
		if v, ok := dbVar[d]; ok {
			return v
		}
		if v, ok := svcVar[d]; ok {
			return v
		}
		b.fail("service dependency %q is neither a database nor an earlier service", d)
		return ""
	}
	for i, s := range services {
		name := reg + "_" + s.name
		inst := pick(s.instances, i%2)
		reduced := b.gate(name+"_capacity_reduced", fmt.Sprintf("Two or more of the %d %s instances in %s down", s.instances, s.name, reg),
			[]string{"no", "yes"}, model.GateKOfN, 2, inst...)
		lost := b.gate(name+"_capacity_lost", fmt.Sprintf("More than half of the %d %s instances in %s down", s.instances, s.name, reg),
			[]string{"no", "yes"}, model.GateKOfN, s.instances/2+1, inst...)
		deploy := b.root(name+"_bad_deploy", "Bad deploy of "+s.name+" in "+reg, noYes, deployRates[r.intn(len(deployRates))])
		causes := []cause{
			{reduced, []effect{{"yes", []int{300_000, 700_000, 0}}}},
			{lost, []effect{{"yes", []int{0, 150_000, 850_000}}}},
			{deploy, []effect{{"yes", []int{300_000, 500_000, 200_000}}}},
		}
		if s.frontEnd {
			causes = append(causes, cause{ingress, []effect{{"lost", []int{0, 50_000, 950_000}}}})
		}
		for _, d := range s.hard {
			causes = append(causes, cause{dep(d), []effect{
				{"degraded", []int{400_000, 550_000, 50_000}},
				{"down", []int{0, 300_000, 700_000}}}})
		}
		for _, d := range s.soft {
			causes = append(causes, cause{dep(d), []effect{
				{"degraded", []int{800_000, 200_000, 0}},
				{"down", []int{400_000, 550_000, 50_000}}}})
		}
		v := b.noisyMAX(name, "The "+s.desc+" in the "+reg+" region", threeLevel, []int{999_000, 800, 200}, causes...)
		// Counted as failed by fault-tree gates only when down.
		b.vars[b.index[v]].FaultStates = []string{"down"}
		b.alarm3("alarm_"+name+"_errors", "Error rate of "+s.name+" in "+reg, v, 5000, 500_000, 30_000)
		b.alarm3("alarm_"+name+"_latency", "Latency of "+s.name+" in "+reg, v, 10_000, 700_000, 400_000)
		if s.frontEnd {
			b.alarm3("alarm_"+name+"_synthetic", "Synthetic transaction against "+s.name+" in "+reg, v, 2000, 300_000, 20_000)
		}
		svcVar[s.name] = v
		regional[s.name] = append(regional[s.name], v)
	}
}

func buildSite(b *builder, r *splitmix64, s string) *site {
	st := &site{}
	hall := "hall " + s

	// Power chain.
	utility := b.rate(s+"_utility_feed", "Utility feed to "+hall, okLost, 200)
	gen1 := b.root(s+"_generator_1", "Standby generator 1 of "+hall+" fails to start", []string{"ok", "fails_to_start"}, 6000+1000*r.intn(5))
	gen2 := b.root(s+"_generator_2", "Standby generator 2 of "+hall+" fails to start", []string{"ok", "fails_to_start"}, 6000+1000*r.intn(5))
	gens := b.gate(s+"_generators", "Neither generator of "+hall+" runs", []string{"ok", "unavailable"}, model.GateAllOf, 0, gen1, gen2)
	ats := b.root(s+"_transfer_switch", "Automatic transfer switch of "+hall+" fails to transfer", okFailed, 1000)
	backup := b.gate(s+"_backup_power", "Backup power of "+hall+" unavailable", []string{"ok", "unavailable"}, model.GateAnyOf, 0, gens, ats)
	upstream := b.gate(s+"_upstream_power", "Utility and backup power of "+hall+" both lost", okLost, model.GateAllOf, 0, utility, backup)
	upsA := b.root(s+"_ups_a", "UPS A of "+hall, okFailed, 4000)
	upsB := b.root(s+"_ups_b", "UPS B of "+hall, okFailed, 4000)
	epo := b.root(s+"_epo_trip", "Emergency power-off of "+hall+" tripped by mistake", noYes, 10)
	st.busA = b.noisyOR(s+"_bus_a", "Power bus A of "+hall, okLost, 20, link{upstream, 990_000}, link{upsA, 250_000}, link{epo, million})
	st.busB = b.noisyOR(s+"_bus_b", "Power bus B of "+hall, okLost, 20, link{upstream, 990_000}, link{upsB, 250_000}, link{epo, million})
	st.sitePower = b.gate(s+"_site_power", "Both power buses of "+hall+" lost", okLost, model.GateAllOf, 0, st.busA, st.busB)

	// Cooling.
	var chillers []string
	for i := 1; i <= 3; i++ {
		chillers = append(chillers, b.rate(fmt.Sprintf("%s_chiller_%d", s, i), fmt.Sprintf("Chiller %d of %s", i, hall), okFailed, 300))
	}
	water := b.gate(s+"_chilled_water", "Two of the three chillers of "+hall+" failed", okLost, model.GateKOfN, 2, chillers...)
	cooling := b.noisyOR(s+"_cooling", "Cooling of "+hall+" lost", okLost, 100, link{water, 950_000}, link{st.sitePower, 900_000})
	for row := 1; row <= rowsPerSite; row++ {
		crah := b.rate(fmt.Sprintf("%s_row%d_air_handler", s, row), fmt.Sprintf("Air handler of row %d in %s", row, hall), okFailed, 40)
		st.hotAisle = append(st.hotAisle, b.noisyOR(fmt.Sprintf("%s_row%d_hot_aisle", s, row), fmt.Sprintf("Row %d of %s overheating", row, hall),
			[]string{"ok", "overheating"}, 100, link{cooling, 900_000}, link{crah, 600_000}))
	}

	// Core network and WAN.
	sw1 := b.root(s+"_core_switch_1", "Core switch 1 of "+hall, okFailed, 2000)
	sw2 := b.root(s+"_core_switch_2", "Core switch 2 of "+hall, okFailed, 2000)
	sws := b.gate(s+"_core_switches", "Both core switches of "+hall+" failed", okFailed, model.GateAllOf, 0, sw1, sw2)
	st.coreNetwork = b.noisyOR(s+"_core_network", "Core network of "+hall+" partitioned", []string{"ok", "partitioned"}, 50,
		link{sws, million}, link{st.sitePower, 990_000})
	wan1 := b.root(s+"_wan_1", "WAN circuit 1 of "+hall+" cut", []string{"ok", "cut"}, 3000)
	wan2 := b.root(s+"_wan_2", "WAN circuit 2 of "+hall+" cut", []string{"ok", "cut"}, 3000)
	st.wan = b.gate(s+"_wan", "Both WAN circuits of "+hall+" cut", []string{"ok", "isolated"}, model.GateAllOf, 0, wan1, wan2)

	// Storage arrays, in rows 1 and 2.
	for a := 1; a <= arraysPerSite; a++ {
		p := fmt.Sprintf("%s_array%d", s, a)
		ca := b.root(p+"_ctrl_a", fmt.Sprintf("Controller A of storage array %d in %s", a, hall), okFailed, 3000)
		cb := b.root(p+"_ctrl_b", fmt.Sprintf("Controller B of storage array %d in %s", a, hall), okFailed, 3000)
		both := b.gate(p+"_controllers", fmt.Sprintf("Both controllers of storage array %d in %s failed", a, hall), okFailed, model.GateAllOf, 0, ca, cb)
		arr := b.noisyMAX(p, fmt.Sprintf("Storage array %d of %s", a, hall), threeLevel, []int{995_000, 4000, 1000},
			cause{ca, []effect{{"failed", []int{200_000, 750_000, 50_000}}}},
			cause{cb, []effect{{"failed", []int{200_000, 750_000, 50_000}}}},
			cause{both, []effect{{"failed", []int{0, 20_000, 980_000}}}},
			cause{st.hotAisle[a-1], []effect{{"overheating", []int{400_000, 350_000, 250_000}}}},
			cause{st.sitePower, []effect{{"lost", []int{0, 50_000, 950_000}}}})
		st.arrays = append(st.arrays, arr)
		b.alarm3(fmt.Sprintf("alarm_%s_latency", p), fmt.Sprintf("I/O latency of storage array %d in %s", a, hall), arr, 20_000, 750_000, 50_000)
	}

	// Site alarms.
	b.alarm("alarm_"+s+"_utility_lost", "Utility feed loss detected in "+hall, utility, 1000, 10_000)
	b.alarm("alarm_"+s+"_bus_a", "Power bus A voltage in "+hall, st.busA, 1000, 30_000)
	b.alarm("alarm_"+s+"_bus_b", "Power bus B voltage in "+hall, st.busB, 1000, 30_000)
	b.alarm("alarm_"+s+"_chilled_water_temp", "Chilled water temperature in "+hall, water, 5000, 50_000)
	b.alarm("alarm_"+s+"_core_ping", "Ping across the core network of "+hall, st.coreNetwork, 5000, 20_000)
	b.alarm("alarm_"+s+"_wan_down", "WAN reachability of "+hall, st.wan, 2000, 10_000)
	for row := 1; row <= rowsPerSite; row++ {
		b.alarm(fmt.Sprintf("alarm_%s_row%d_aisle_temp", s, row), fmt.Sprintf("Hot-aisle temperature of row %d in %s", row, hall), st.hotAisle[row-1], 10_000, 50_000)
	}

	// Racks and hosts.
	for k := 1; k <= racksPerSite; k++ {
		rk := fmt.Sprintf("%s_r%02d", s, k)
		rack := "rack " + rk
		aisle := st.hotAisle[(k-1)/racksPerRow]
		pduA := b.root(rk+"_pdu_a", "PDU A of "+rack, okFailed, 500)
		pduB := b.root(rk+"_pdu_b", "PDU B of "+rack, okFailed, 500)
		feedA := b.gate(rk+"_feed_a", "Feed A of "+rack+" lost", okLost, model.GateAnyOf, 0, pduA, st.busA)
		feedB := b.gate(rk+"_feed_b", "Feed B of "+rack+" lost", okLost, model.GateAnyOf, 0, pduB, st.busB)
		power := b.gate(rk+"_power", "Both feeds of "+rack+" lost", okLost, model.GateAllOf, 0, feedA, feedB)
		tor := b.root(rk+"_tor", "Top-of-rack switch of "+rack, okFailed, 1000)
		network := b.gate(rk+"_network", "Rack "+rk+" cut off from the core network", []string{"ok", "isolated"}, model.GateAnyOf, 0, tor, st.coreNetwork)
		heat := b.noisyOR(rk+"_overheat", "Inlet of rack "+rk+" over temperature", noYes, 200, link{aisle, 700_000})
		rackDown := b.noisyOR(rk+"_down", "Rack "+rk+" cannot run its hosts", []string{"ok", "down"}, 0,
			link{power, million}, link{network, million}, link{heat, 300_000})
		b.alarm("alarm_"+rk+"_power", "Power loss of "+rack, power, 500, 5000)
		b.alarm("alarm_"+rk+"_inlet_temp", "Inlet temperature of "+rack, heat, 5000, 50_000)
		b.alarm("alarm_"+rk+"_tor_ping", "Ping to the top-of-rack switch of "+rack, network, 2000, 10_000)
		var hosts []string
		for h := 1; h <= hostsPerRack; h++ {
			hn := fmt.Sprintf("%s_h%d", rk, h)
			hw := b.rate(hn+"_hw", "Hardware fault of host "+hn, okFailed, hostRates[r.intn(len(hostRates))])
			hostDown := b.noisyOR(hn+"_down", "Host "+hn+" not serving", []string{"ok", "down"}, 200,
				link{hw, million}, link{rackDown, million})
			b.alarm("alarm_"+hn+"_heartbeat", "Missed heartbeats from host "+hn, hostDown, 1000, 10_000)
			hosts = append(hosts, hostDown)
		}
		st.hosts = append(st.hosts, hosts)
	}
	return st
}

// buildGlobal adds the providers and customer-facing functions and returns
// how many functions there are.
func buildGlobal(b *builder, regional map[string][]string) int {
	dns := b.root("dns_provider", "Outage of the DNS provider", okFailed, 500)
	cdn := b.root("cdn_provider", "Outage of the content delivery network", okFailed, 1000)
	cert := b.root("tls_certificate_expired", "Public TLS certificate left to expire", noYes, 100)
	sms := b.root("sms_gateway_provider", "Outage of the text-message gateway provider", okFailed, 2000)
	functions := []function{
		{"customer_checkout", "Customers can book and pay for parcels", "checkout_api", []cause{
			{dns, []effect{{"failed", []int{0, 100_000, 900_000}}}},
			{cdn, []effect{{"failed", []int{300_000, 600_000, 100_000}}}},
			{cert, []effect{{"yes", []int{0, 50_000, 950_000}}}}}},
		{"public_tracking", "Customers can track parcels", "tracking_api", []cause{
			{dns, []effect{{"failed", []int{0, 100_000, 900_000}}}},
			{cdn, []effect{{"failed", []int{300_000, 600_000, 100_000}}}},
			{cert, []effect{{"yes", []int{0, 50_000, 950_000}}}}}},
		{"depot_scanning", "Depot scanners can record parcels", "depot_gateway", []cause{
			{dns, []effect{{"failed", []int{0, 200_000, 800_000}}}},
			{cert, []effect{{"yes", []int{0, 50_000, 950_000}}}}}},
		{"customer_notifications", "Customers get delivery notifications", "notifications", []cause{
			{sms, []effect{{"failed", []int{0, 700_000, 300_000}}}}}},
	}
	for _, f := range functions {
		regs := regional[f.regional]
		if len(regs) != len(regionNames) {
			b.fail("function %q: service %q is in %d regions, want %d", f.name, f.regional, len(regs), len(regionNames))
			return 0
		}
		all := b.gate(f.name+"_all_regions_down", "Every region's "+f.regional+" down", noYes, model.GateAllOf, 0, regs...)
		var causes []cause
		for _, v := range regs {
			causes = append(causes, cause{v, []effect{
				{"degraded", []int{850_000, 150_000, 0}},
				{"down", []int{200_000, 750_000, 50_000}}}})
		}
		causes = append(causes, cause{all, []effect{{"yes", []int{0, 0, million}}}})
		causes = append(causes, f.external...)
		v := b.noisyMAX(f.name, f.desc, threeLevel, []int{999_500, 400, 100}, causes...)
		b.alarm3("alarm_"+f.name+"_external_probe", "External probe of "+f.name, v, 1000, 400_000, 10_000)
	}
	return len(functions)
}
