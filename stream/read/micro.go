package read

import (
	"encoding/json"
	"errors"
	"fmt"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
)

// Request/reply read surface.
const (
	// MicroServiceName is the name the read service registers under;
	// `nats micro info rivalmix` lists its endpoints.
	MicroServiceName = "rivalmix"
	// MicroServiceVersion is the version of the read service's protocol.
	MicroServiceVersion = "1.0.0"
	// MicroSubjectPrefix is the subject prefix of the read endpoints.
	MicroSubjectPrefix = "rivalmix.read"
)

// Error codes of the read service, in the Nats-Service-Error-Code header.
const (
	microBadRequest = "400"
	microNotFound   = "404"
	microInternal   = "500"
)

// ProductRequest is the request body of rivalmix.read.product.
type ProductRequest struct {
	// Category and Product name the product asked for; both required.
	Category string `json:"category"`
	Product  string `json:"product"`
}

// StartMicro registers the read queries as a NATS micro service named
// "rivalmix" on nc, in the default queue group so that several workers
// share the requests:
//
//	rivalmix.read.categories  body ignored                   reply CategoriesResponse
//	rivalmix.read.segments    body: the category name         reply SegmentsResponse
//	rivalmix.read.product     body: ProductRequest as JSON    reply ProductView
//
// The replies are the same JSON as the HTTP API. An error reply carries no
// body and the Nats-Service-Error and Nats-Service-Error-Code headers: 400
// for a malformed request, 404 for an unknown category or product. Stop
// the returned service before closing nc.
func StartMicro(nc *nats.Conn, views *Views) (micro.Service, error) {
	if nc == nil || views == nil {
		return nil, errors.New("read: StartMicro: connection and views are required")
	}
	svc, err := micro.AddService(nc, micro.Config{
		Name:        MicroServiceName,
		Version:     MicroServiceVersion,
		Description: "rivalmix read queries: categories, segments, products",
	})
	if err != nil {
		return nil, fmt.Errorf("read: add micro service %s: %w", MicroServiceName, err)
	}
	g := svc.AddGroup(MicroSubjectPrefix)
	endpoints := []struct {
		name string
		h    micro.HandlerFunc
	}{
		{"categories", func(req micro.Request) {
			respond(req, views.ReadCategories(), nil)
		}},
		{"segments", func(req micro.Request) {
			cat := string(req.Data())
			if cat == "" {
				replyError(req, microBadRequest, "request body must be the category name")
				return
			}
			resp, err := views.ReadSegments(cat)
			respond(req, resp, err)
		}},
		{"product", func(req micro.Request) {
			var pr ProductRequest
			if err := json.Unmarshal(req.Data(), &pr); err != nil {
				replyError(req, microBadRequest, "request body must be {\"category\":...,\"product\":...}: "+err.Error())
				return
			}
			if pr.Category == "" || pr.Product == "" {
				replyError(req, microBadRequest, "request needs both category and product")
				return
			}
			resp, err := views.ReadProduct(pr.Category, pr.Product)
			respond(req, resp, err)
		}},
	}
	for _, e := range endpoints {
		if err := g.AddEndpoint(e.name, e.h); err != nil {
			_ = svc.Stop()
			return nil, fmt.Errorf("read: add micro endpoint %s.%s: %w", MicroSubjectPrefix, e.name, err)
		}
	}
	return svc, nil
}

func respond(req micro.Request, v any, err error) {
	switch {
	case errors.Is(err, ErrNotFound):
		replyError(req, microNotFound, err.Error())
		return
	case err != nil:
		replyError(req, microInternal, err.Error())
		return
	}
	body, err := json.Marshal(v)
	if err != nil {
		replyError(req, microInternal, "cannot encode the response: "+err.Error())
		return
	}
	// A failed reply (requester gone, connection lost) is counted in the
	// endpoint's stats by micro; there is no one else to tell.
	_ = req.Respond(body)
}

func replyError(req micro.Request, code, description string) {
	_ = req.Error(code, description, nil)
}
